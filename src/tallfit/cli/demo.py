"""tallfit demo: the whole job on generated fleet telemetry."""

from __future__ import annotations

NAME = "demo"
HELP = "generate demo fleet telemetry, fit it, and show the result"


def register(sub) -> None:
    d = sub.add_parser(NAME, help=HELP, description="Generate server-fleet power telemetry, fit it, show the result, and score new rows.")
    d.add_argument("--dir", default="tallfit-demo", help="where to write the demo data and outputs (default ./tallfit-demo)")
    d.add_argument("--rows", type=int, default=400_000, help="rows of demo telemetry (default 400000)")
    d.add_argument("--seed", type=int, default=7, help="random seed (default 7)")
    d.add_argument("--no-progress", action="store_true", help="do not show progress")


def run(args) -> int:
    from tallfit.demo import run_demo

    return run_demo(args.dir, rows=args.rows, seed=args.seed, progress=not args.no_progress)
