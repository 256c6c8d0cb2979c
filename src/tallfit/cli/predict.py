"""tallfit predict: stream new rows through a saved model into a file."""

from __future__ import annotations

import sys

from tallfit.cli.common import add_data_options, add_scheduler_option, open_data, progress_for, split_list

NAME = "predict"
HELP = "score new data with a saved model"


def register(sub) -> None:
    p = sub.add_parser(NAME, help=HELP, description="Stream new rows through a saved model.")
    p.add_argument("model", help="model file")
    add_data_options(p)
    p.add_argument("--out", required=True, help="output file (.parquet or .csv), written atomically")
    p.add_argument("--intervals", action="store_true", help="add ci_low/ci_high (mean) and pi_low/pi_high (new row)")
    p.add_argument("--level", type=float, default=None, help="interval level (default: the model's)")
    p.add_argument("--unseen", choices=["error", "reference", "other"], default="error", help="categorical levels the model never saw: stop (default), or score as the reference or the merged other level")
    p.add_argument("--keep", type=split_list, default=[], metavar="COLS", help="comma-separated columns to copy through (an id, a timestamp)")
    add_scheduler_option(p)


def run(args) -> int:
    from tallfit.atomic import check_writable
    from tallfit.modelfile import load_model
    from tallfit.scoring import predict

    model = load_model(args.model)
    check_writable(args.out)
    source = open_data(args)
    with progress_for(args, source, "scoring") as prog:
        report = predict(
            model,
            source,
            out=args.out,
            intervals=args.intervals,
            level=args.level,
            passthrough=args.keep,
            batch_rows=args.batch_rows,
            progress=prog,
            unseen=args.unseen,
            scheduler=args.scheduler,
        )
    where = f" (scored on the dask cluster {report.cluster['scheduler']}, {report.cluster['parts']} parts)" \
        if report.cluster else ""
    print(f"{report.rows:,} predictions written to {args.out}{where} (columns: {', '.join(report.columns)})")
    for w in report.warnings():
        print(f"note: {w}", file=sys.stderr)
    return 0
