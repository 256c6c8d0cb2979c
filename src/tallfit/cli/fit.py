"""tallfit fit: one pass over the data, a model file, a summary."""

from __future__ import annotations

import sys

from tallfit.cli.common import add_data_options, add_design_options, design_kwargs, open_data, progress_for, split_list

NAME = "fit"
HELP = "fit a model on a data set and save it"


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
    add_design_options(f)


def run(args) -> int:
    from tallfit.api import fit
    from tallfit.atomic import check_writable
    from tallfit.modelfile import encode_json
    from tallfit.solve.exact import DEFAULT_RANK_TOL

    if not (args.features or args.categorical or args.derive or args.interactions or args.poly):
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
