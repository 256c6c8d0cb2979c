"""tallfit fit: one pass over the data, a model file, a summary."""

from __future__ import annotations

import sys

from tallfit.cli.common import (add_data_options, add_design_options, add_scheduler_option, design_kwargs, open_data,
                                progress_for, split_list)

NAME = "fit"
HELP = "fit a model on a data set and save it"


def _positive_int(text: str) -> int:
    import argparse

    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a whole number: {text!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"must be at least 1: {text!r}")
    return value


def register(sub) -> None:
    f = sub.add_parser(NAME, help=HELP, description="Fit TARGET on FEATURES by exact least squares, one pass over the data.")
    add_data_options(f)
    f.add_argument("--target", required=True, help="the column to explain")
    f.add_argument("--features", type=split_list, default=[], help="comma-separated numeric columns")
    f.add_argument("--out", help="write the model file here (JSON, written atomically)")
    f.add_argument("--no-intercept", action="store_true", help="fit without a constant term (R² becomes uncentred)")
    f.add_argument("--drop-aliased", action="store_true", help="fit without terms that are combinations of others, and report them")
    f.add_argument("--refine", nargs="?", type=int, const=2, default=0, metavar="PASSES", help="passes of iterative refinement in extended precision (2 when given alone)")
    f.add_argument("--level", type=float, default=0.95, help="confidence level of the intervals (default 0.95)")
    f.add_argument("--rank-tol", type=float, default=None, help="tolerance for calling a term aliased (default 1e-11)")
    f.add_argument("--json", action="store_true", help="print the result as JSON instead of the summary")
    f.add_argument("--robust", type=str.upper, choices=["HC0", "HC1", "HC2", "HC3", "ALL"], default=None, help="one more pass for heteroskedasticity-robust errors, shown beside the plain ones (all: the four, a slower pass)")
    f.add_argument("--cluster", type=split_list, default=None, metavar="COLS", help="one more pass for errors clustered by one or two key columns (e.g. host_id or host_id,day)")
    add_design_options(f)
    f.add_argument("--solver", choices=["exact", "gd", "cg", "lbfgs", "sgd"], default="exact", help="exact (default) or an iterative solver run after the factor pass, one pass per iteration or epoch")
    f.add_argument("--solver-options", type=_solver_options, default={}, metavar="K=V,...", help="options of the iterative solver, e.g. epochs=5,learning_rate=0.1,momentum=0.9 (see tallfit compare)")
    f.add_argument("--cache", action="store_true", help="with an iterative solver: keep the decoded design in a local memory-mapped file for re-passes")
    f.add_argument("--spill-dir", default=None, help="directory for that cache (default: the system temporary directory)")
    f.add_argument("--workers", type=_positive_int, default=None, metavar="N", help="threads reading and folding in parallel (default: all cores)")
    add_scheduler_option(f)
    f.add_argument("--method", choices=["qr", "gram", "auto"], default="qr", help="qr: stable Householder factor (default); gram: faster co-moments, fewer digits on ill-conditioned data (warns); auto: gram, with a stable pass when it would be unsafe")


def _solver_options(text: str) -> dict:
    """'epochs=5,average=false,schedule=inverse' → {'epochs': 5, 'average': False, 'schedule': 'inverse'}."""
    import argparse

    out: dict = {}
    for item in split_list(text):
        key, sep, value = item.partition("=")
        if not sep or not key.strip():
            raise argparse.ArgumentTypeError(f"solver option {item!r} is not KEY=VALUE")
        v = value.strip()
        low = v.lower()
        if low in ("true", "false"):
            out[key.strip()] = low == "true"
            continue
        try:
            out[key.strip()] = int(v)
        except ValueError:
            try:
                out[key.strip()] = float(v)
            except ValueError:
                out[key.strip()] = v
    return out


def _solver_kwargs(args) -> dict:
    """fit()'s solver keywords; the exact solver passes none, so its call is unchanged."""
    if args.solver == "exact":
        if args.solver_options or args.cache:
            from tallfit.errors import DesignError

            raise DesignError("--solver-options and --cache apply to an iterative --solver (gd, cg, lbfgs, sgd)")
        return {}
    opts = dict(args.solver_options)
    if args.cache:
        opts.update(cache=True, spill_dir=args.spill_dir)
    return {"solver": args.solver, "solver_options": opts}


def run(args) -> int:
    from tallfit.api import fit
    from tallfit.atomic import check_writable
    from tallfit.modelfile import encode_json
    from tallfit.solve.exact import DEFAULT_RANK_TOL

    if not (args.features or args.categorical or args.derive or args.interactions or args.poly or args.absorb):
        from tallfit.errors import DesignError

        raise DesignError("no terms: name the explaining columns with --features (and/or --categorical)")
    if args.out:
        check_writable(args.out)
    source = open_data(args)
    with progress_for(args, source) as prog:
        result = fit(
            source,
            args.target,
            args.features,
            intercept=not args.no_intercept,
            batch_rows=args.batch_rows,
            drop_aliased=args.drop_aliased,
            refine=args.refine,
            conf_level=args.level,
            rank_tol=DEFAULT_RANK_TOL if args.rank_tol is None else args.rank_tol,
            progress=prog,
            **design_kwargs(args),
            robust=args.robust,
            cluster=args.cluster,
            **_solver_kwargs(args),
            workers=args.workers,
            method=args.method,
            scheduler=args.scheduler,
        )
    if args.out:
        result.save(args.out)
    if args.json:
        print(encode_json(result.to_dict(), indent=2))
    else:
        sys.stdout.write(result.summary())
        if args.out:
            print(f"model written to {args.out}")
    return 0
