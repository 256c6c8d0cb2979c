"""tallfit compare: the exact fit against iterative solvers on the same data, pass by pass."""

from __future__ import annotations

import sys

from tallfit.cli.common import add_data_options, add_design_options, design_kwargs, open_data, progress_for, split_list

NAME = "compare"
HELP = "measure iterative solvers against the exact fit on one data set"


def register(sub) -> None:
    c = sub.add_parser(NAME, help=HELP, description=(
        "Fit TARGET on FEATURES exactly, then with iterative solvers (gradient descent, conjugate gradients, "
        "L-BFGS, mini-batch SGD), and report per pass the exact training-loss gap to the optimum, the "
        "coefficient error and the holdout error; a table, plots and JSON."))
    add_data_options(c)
    c.add_argument("--target", required=True, help="the column to explain")
    c.add_argument("--features", type=split_list, default=[], help="comma-separated numeric columns")
    c.add_argument("--no-intercept", action="store_true", help="fit without a constant term")
    c.add_argument("--solvers", type=split_list, default=["gd", "cg", "lbfgs", "sgd"], help="iterative solvers to run (default gd,cg,lbfgs,sgd)")
    c.add_argument("--passes", type=int, default=None, metavar="N", help="pass budget of gd, cg and lbfgs (default: each solver's own)")
    c.add_argument("--epochs", type=int, default=None, help="SGD epochs (default 10)")
    c.add_argument("--batch-size", type=int, default=None, help="SGD mini-batch rows (default 256)")
    c.add_argument("--learning-rate", type=float, default=None, help="SGD learning rate (default: automatic from the Gram spectrum)")
    c.add_argument("--schedule", choices=["constant", "inverse", "step"], default=None, help="SGD learning-rate schedule")
    c.add_argument("--momentum", type=float, default=None, help="SGD heavy-ball momentum in [0, 1)")
    c.add_argument("--step-scale", type=float, default=None, help="gradient-descent step as a multiple of 1/L (default 1)")
    c.add_argument("--no-standardize", action="store_true", help="run the solvers on the raw features")
    c.add_argument("--holdout", nargs="+", default=None, metavar="DATA", help="held-out data: its mean squared error is reported per pass")
    c.add_argument("--cache", action="store_true", help="keep the decoded design in a local memory-mapped file for re-passes")
    c.add_argument("--spill-dir", default=None, help="directory for the cache (default: the system temporary directory)")
    c.add_argument("--out", default=None, metavar="STEM", help="write STEM.json, STEM.png and STEM.svg")
    c.add_argument("--json", action="store_true", help="print the JSON document instead of the table")
    add_design_options(c)


def _solver_options(args) -> dict:
    opts: dict = {}
    for name in ("gd", "cg", "lbfgs"):
        if args.passes is not None:
            opts.setdefault(name, {})["max_passes"] = args.passes
    if args.step_scale is not None:
        opts.setdefault("gd", {})["step_scale"] = args.step_scale
    sgd = {k: v for k, v in (("epochs", args.epochs), ("batch_size", args.batch_size),
                             ("learning_rate", args.learning_rate), ("schedule", args.schedule),
                             ("momentum", args.momentum)) if v is not None}
    if sgd:
        opts["sgd"] = sgd
    return {k: v for k, v in opts.items() if k in args.solvers}


def source_delimiter(args) -> str:
    return "\t" if args.delimiter in ("\\t", "tab", "TAB") else args.delimiter


def run(args) -> int:
    from tallfit.atomic import check_writable
    from tallfit.compare import compare
    from tallfit.compare.report import render_text, to_dict
    from tallfit.modelfile import encode_json
    from tallfit.render.compare_plots import save_plots

    if not (args.features or args.categorical or args.derive or args.interactions or args.poly):
        from tallfit.errors import DesignError

        raise DesignError("no terms: name the explaining columns with --features (and/or --categorical)")
    if args.out:
        for ext in ("json", "png", "svg"):
            check_writable(f"{args.out}.{ext}")
    source = open_data(args)
    holdout = None
    if args.holdout:
        holdout = args.holdout[0] if len(args.holdout) == 1 else args.holdout
    with progress_for(args, source) as prog:
        cmp = compare(source, args.target, args.features, solvers=args.solvers, solver_options=_solver_options(args),
                      standardize=not args.no_standardize, holdout=holdout, cache=args.cache,
                      spill_dir=args.spill_dir, batch_rows=args.batch_rows, progress=prog, format=args.format,
                      delimiter=source_delimiter(args),
                      intercept=not args.no_intercept, **design_kwargs(args))
    doc = to_dict(cmp)
    if args.out:
        from tallfit.atomic import write_text_atomic

        write_text_atomic(f"{args.out}.json", encode_json(doc, indent=1) + "\n")
        save_plots(doc, args.out)
    if args.json:
        print(encode_json(doc, indent=2))
    else:
        sys.stdout.write(render_text(cmp))
        if args.out:
            print(f"written: {args.out}.json, {args.out}.png, {args.out}.svg")
    return 0
