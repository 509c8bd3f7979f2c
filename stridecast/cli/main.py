"""The `stridecast` command line: a parser per command, handlers imported lazily.

Heavy parts (torch for `train`/`export`, FastAPI for `serve`) are imported inside the command
that needs them, so `stridecast advance` starts as fast as NumPy does.
"""

from __future__ import annotations

import argparse
import sys

from stridecast import __version__
from stridecast.caution import CAUTION

from . import ensemble_command, optional_commands, runtime_commands, train_command
from .parsing import EXIT_CODES, Handler, Parser, ShowCaution, formatter, join_negative_values

# In the order `stridecast --help` lists them.
COMMAND_MODULES = (runtime_commands, optional_commands, train_command, ensemble_command)


def build_parser() -> argparse.ArgumentParser:
    parser = Parser(
        prog="stridecast", formatter_class=formatter,
        description="Deploy learned multi-scale flow-map time-steppers.\n\n" + CAUTION,
        epilog=EXIT_CODES,
    )
    parser.add_argument("--version", action="version", version=f"stridecast {__version__}")
    parser.add_argument("--caution", action=ShowCaution,
                        help="print the caution about learned steppers and exit")
    subparsers = parser.add_subparsers(dest="command", metavar="COMMAND")

    # Each module adds its own commands' parsers; their handlers import heavy parts lazily.
    for module in COMMAND_MODULES:
        module.register(subparsers)
    return parser


def _resolve(handler: str) -> Handler:
    module_name, function_name = handler.split(":")
    module = __import__(module_name, fromlist=[function_name])
    return getattr(module, function_name)


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    argv = list(sys.argv[1:] if argv is None else argv)
    arguments = parser.parse_args(join_negative_values(parser, argv))
    if not getattr(arguments, "handler", None):
        parser.print_help()
        return 2
    from stridecast.runtime import StridecastError

    try:
        return _resolve(arguments.handler)(arguments)
    except StridecastError as error:
        print(f"stridecast {arguments.command}: error: {error}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        print(f"stridecast {arguments.command}: interrupted", file=sys.stderr)
        return 130
