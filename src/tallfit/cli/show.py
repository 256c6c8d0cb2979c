"""tallfit show: a saved model as a summary or as JSON."""

from __future__ import annotations

import sys

NAME = "show"
HELP = "print a saved model (summary, or --json)"


def register(sub) -> None:
    s = sub.add_parser(NAME, help=HELP, description="Print a model file as a summary or as JSON.")
    s.add_argument("model", help="model file written by 'tallfit fit --out'")
    s.add_argument("--json", action="store_true", help="machine-readable result (see README for the fields)")


def run(args) -> int:
    from tallfit.modelfile import encode_json, load_model

    result = load_model(args.model)
    if args.json:
        print(encode_json(result.to_dict(), indent=2))
    else:
        sys.stdout.write(result.summary())
    return 0
