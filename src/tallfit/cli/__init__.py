"""The command line over tallfit.api: one module per command, listed in COMMANDS.

Exit codes: 0 success; 2 bad input or usage (a one-line message on stderr, nothing written);
1 an internal error (please report it; set TALLFIT_DEBUG=1 for the traceback); 130 interrupted.
Heavy modules are imported only inside the commands, so ``tallfit --help`` is quick.
"""

from __future__ import annotations

import argparse
import importlib
import os
import sys

# command modules, in the order --help lists them; each has NAME, HELP, register(sub), run(args)
COMMANDS = ["fit", "show", "predict", "validate", "report", "compare", "demo"]

EPILOG = "exit codes: 0 ok, 2 bad input or usage, 1 internal error, 130 interrupted"


def _modules():
    return [importlib.import_module(f"tallfit.cli.{name}") for name in COMMANDS]


def build_parser() -> tuple[argparse.ArgumentParser, dict]:
    parser = argparse.ArgumentParser(
        prog="tallfit",
        description="Exact multiple linear regression, with honest inference, on data far larger than memory.",
        epilog=EPILOG,
    )
    parser.add_argument("--version", action="store_true", help="print the version and exit")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    runners = {}
    for module in _modules():
        module.register(sub)
        runners[module.NAME] = module.run
    return parser, runners


def main(argv: list[str] | None = None) -> int:
    parser, runners = build_parser()
    args = parser.parse_args(argv)
    if args.version:
        from tallfit import __version__

        print(f"tallfit {__version__}")
        return 0
    if not args.command:
        parser.print_help()
        return 2
    from tallfit.errors import TallfitError

    try:
        return runners[args.command](args)
    except TallfitError as exc:
        print(f"tallfit {args.command}: error: {exc}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print("tallfit: interrupted; no output was written", file=sys.stderr)
        return 130
    except BrokenPipeError:
        return 0
    except Exception as exc:  # an internal fault: one line, the traceback on request
        if os.environ.get("TALLFIT_DEBUG"):
            raise
        print(
            f"tallfit {args.command}: internal error: {type(exc).__name__}: {exc} "
            "(set TALLFIT_DEBUG=1 for the traceback, and please report it)",
            file=sys.stderr,
        )
        return 1


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
