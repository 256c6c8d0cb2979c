"""tallfit validate: prediction error on rows not fitted (holdout, k-fold CV), ridge, term search."""

from __future__ import annotations

import sys

from tallfit.cli.common import (add_data_options, add_design_options, add_scheduler_option, design_kwargs, open_data,
                                progress_for, split_list)

NAME = "validate"
HELP = "measure prediction error on unseen rows: holdout, k-fold CV, ridge path, term selection"

DESCRIPTION = (
    "One pass over the data fills a factor per fold (and one for the holdout); the training fit, the "
    "cross-validation error, the ridge path and the term search are then derived from those small "
    "factors without reading the data again."
)


def penalties(value: str):
    """'auto', 'LOW:HIGH' or 'LOW:HIGH:COUNT' (a log grid), or a comma-separated list."""
    from tallfit.errors import DesignError

    text = value.strip().lower()
    if text == "auto":
        return "auto"
    try:
        if ":" in text:
            parts = [float(p) for p in text.split(":")]
            if len(parts) not in (2, 3) or not 0 < parts[0] < parts[1]:
                raise ValueError
            import numpy as np

            return list(np.geomspace(parts[0], parts[1], int(parts[2]) if len(parts) == 3 else 50))
        values = [float(p) for p in text.split(",") if p.strip()]
        if not values or any(v < 0 for v in values):
            raise ValueError
        return values
    except ValueError:
        raise DesignError(
            f"--ridge-path {value!r} is not understood: give 'auto', a log range LOW:HIGH[:COUNT] "
            "with 0 < LOW < HIGH (e.g. 0.01:1e4:50), or a list of non-negative penalties (0.1,1,10)"
        ) from None


def register(sub) -> None:
    v = sub.add_parser(NAME, help=HELP, description=DESCRIPTION)
    add_data_options(v)
    v.add_argument("--target", required=True, help="the column to explain")
    v.add_argument("--features", required=True, type=split_list, help="comma-separated numeric columns")
    v.add_argument("--no-intercept", action="store_true", help="fit without a constant term")
    v.add_argument("--drop-aliased", action="store_true", help="fit without terms that are combinations of others")
    add_design_options(v)
    v.add_argument("--folds", type=int, default=10, help="number of cross-validation folds (0 for none; default 10)")
    v.add_argument("--fold-key", metavar="COLUMN", help="keep all rows with one value of COLUMN in one fold (a host id)")
    v.add_argument("--holdout", type=float, default=0.0, metavar="FRACTION", help="set aside this fraction of rows (e.g. 0.2)")
    v.add_argument("--holdout-key", metavar="COLUMN", help="hold out whole values of COLUMN (a day) rather than rows")
    v.add_argument("--seed", type=int, default=0, help="seed of the row assignment (default 0)")
    v.add_argument("--ridge-path", metavar="PENALTIES",
                   help="'auto' (50 log-spaced penalties), LOW:HIGH[:COUNT], or a list 0.1,1,10")
    v.add_argument("--ridge-rule", choices=["min", "1se"], default="min",
                   help="choose the penalty of least CV error, or the largest within one SE of it (default min)")
    v.add_argument("--select", choices=["forward", "backward", "best"], help="search the terms")
    v.add_argument("--criterion", choices=["aic", "bic", "adj_r2", "cv"], default="bic", help="ranking of the search (default bic)")
    v.add_argument("--test-terms", action="append", type=split_list, default=[], metavar="TERMS",
                   help="F test of these terms given the others (repeatable)")
    v.add_argument("--mae", action="store_true", help="also the holdout's mean absolute error (a second pass)")
    v.add_argument("--out-json", metavar="PATH", help="write the report as JSON (atomically)")
    v.add_argument("--plot", metavar="PATH", help="coefficient-path plot of the ridge path (.png or .svg)")
    v.add_argument("--out", metavar="PATH", help="write the chosen model as a model file (ridge when a penalty was chosen)")
    v.add_argument("--json", action="store_true", help="print the report as JSON instead of text")
    add_scheduler_option(v)


def run(args) -> int:
    from tallfit.api import validate
    from tallfit.atomic import check_writable, write_text_atomic
    from tallfit.errors import DesignError
    from tallfit.modelfile import encode_json
    from tallfit.render.validation import PLOT_FORMATS, plot_coefficient_path

    ridge = penalties(args.ridge_path) if args.ridge_path else None
    for path in (args.out_json, args.plot, args.out):
        if path:
            check_writable(path)
    if args.plot:
        if not args.ridge_path:
            raise DesignError("--plot draws the ridge coefficient paths: give --ridge-path too (e.g. auto)")
        if not args.plot.lower().endswith(tuple("." + f for f in PLOT_FORMATS)):
            raise DesignError(f"--plot {args.plot!r}: give a .png or .svg file name")
    source = open_data(args)
    with progress_for(args, source) as prog:
        report = validate(
            source, args.target, args.features,
            folds=args.folds, fold_key=args.fold_key, holdout=args.holdout, holdout_key=args.holdout_key,
            seed=args.seed, ridge=ridge, ridge_rule=args.ridge_rule, select=args.select,
            criterion=args.criterion, compare=args.test_terms, mae=args.mae,
            intercept=not args.no_intercept, drop_aliased=args.drop_aliased, batch_rows=args.batch_rows,
            progress=prog, **design_kwargs(args), scheduler=args.scheduler,
        )
    doc = encode_json(report.to_dict(), indent=2)
    if args.out_json:
        write_text_atomic(args.out_json, doc + "\n")
    if args.plot:
        plot_coefficient_path(report.ridge, args.plot)
    model = report.fit
    if report.ridge is not None and report.ridge.chosen_fit is not None:
        model = report.ridge.chosen_fit
    if args.out:
        model.save(args.out)
    if args.json:
        print(doc)
    else:
        sys.stdout.write(report.summary())
        for label, path in (("report", args.out_json), ("plot", args.plot), ("model", args.out)):
            if path:
                print(f"{label} written to {path}")
    return 0
