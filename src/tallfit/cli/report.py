"""tallfit report: one more pass with a saved model, then a self-contained HTML report and its images."""

from __future__ import annotations

from tallfit.cli.common import add_data_options, add_scheduler_option, open_data, progress_for, split_list

NAME = "report"
HELP = "check a saved model on its data (robust errors, residual diagnostics) and write an HTML report"


def register(sub) -> None:
    p = sub.add_parser(
        NAME, help=HELP,
        description="Read the data once more with a saved model: robust and clustered errors, binned "
        "residual checks for curvature and unequal noise, the residual distribution; write one HTML "
        "file (images embedded) and the images as PNG and SVG.",
    )
    p.add_argument("model", help="model file")
    add_data_options(p)
    p.add_argument("--out", required=True, help="the HTML file to write (atomically); images go to <name>_files/ beside it")
    p.add_argument("--robust", type=str.upper, choices=["HC0", "HC1", "HC2", "HC3", "ALL"], default="HC3", help="robust errors to show beside the plain ones (default HC3; all: the four, a slower pass)")
    p.add_argument("--cluster", type=split_list, default=[], metavar="COLS", help="cluster errors by one or two key columns (e.g. host_id or host_id,day)")
    p.add_argument("--keep", type=split_list, default=[], metavar="COLS", help="id columns to list with the largest residuals and leverages")
    p.add_argument("--bins", type=int, default=20, metavar="N", help="bins per feature in the residual checks (default 20)")
    p.add_argument("--no-images", action="store_true", help="write only the HTML file (images still embedded)")
    add_scheduler_option(p)
    p.add_argument("--group", metavar="KEY", help="for per-group models (fit --by): the group to check, as the "
                   "model's summary names it (e.g. north-1); the pass reads that group's rows only. Without it "
                   "every group is checked in one pass (up to 50 groups) and the report opens with an overview")


def run(args) -> int:
    from tallfit.api import diagnose
    from tallfit.atomic import check_writable
    from tallfit.errors import DesignError
    from tallfit.modelfile import load_model
    from tallfit.render.group_report import group_findings, write_group_report
    from tallfit.render.report import write_report

    if not 4 <= args.bins <= 200:
        raise DesignError(f"--bins {args.bins}: give between 4 and 200 bins per feature")
    model = load_model(args.model)
    check_writable(args.out)
    source = open_data(args)
    with progress_for(args, source, "checking") as prog:
        found = diagnose(model, source, robust=args.robust, cluster=args.cluster, keep=args.keep,
                         bins=args.bins, batch_rows=args.batch_rows, progress=prog, group=args.group,
                         scheduler=args.scheduler)
    if "groups" in found:  # a per-group model without --group: every group, one pass
        written = write_group_report(found["model"], found["groups"], args.out, images=not args.no_images,
                                     data_description=found["source"], unchecked=found["unchecked"])
        advice = group_findings(found["groups"]) + [f"{k}: not checked, {why}" for k, why in found["unchecked"].items()]
        advice.append("each group's advice is in its section of the report")
    else:
        written = write_report(found["model"], found["diagnostics"], args.out, images=not args.no_images,
                               data_description=found["source"])
        advice = found["diagnostics"]["advice"]
    print(f"report written to {args.out}" + (f" (images in {written['images_dir']})" if written.get("images_dir") else ""))
    for line in advice:
        print(f"  · {line}")
    return 0
