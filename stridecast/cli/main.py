"""The `stridecast` command line: a parser per command, handlers imported lazily.

Heavy parts (torch for `train`/`export`, FastAPI for `serve`) are imported inside the command
that needs them, so `stridecast advance` starts as fast as NumPy does.
"""

from __future__ import annotations

import argparse
import re
import sys
from collections.abc import Callable

from . import __version__
from .caution import CAUTION

EXIT_CODES = (
    "exit codes, the same for every command:\n"
    "  0  success\n"
    "  1  failure: bad input, a bundle that does not load, a port in use, a missing extra\n"
    "  2  usage: unknown option, missing or malformed argument\n"
    "  130  interrupted (Ctrl-C)"
)

Handler = Callable[[argparse.Namespace], int]


class _ShowCaution(argparse.Action):
    """`--caution`: print the caution on demand, like `--version` prints the version."""

    def __init__(self, option_strings, dest, **kwargs):
        super().__init__(option_strings, dest, nargs=0, default=argparse.SUPPRESS, **kwargs)

    def __call__(self, parser, namespace, values, option_string=None):
        print(CAUTION)
        parser.exit(0)


class _DeprecatedAlias(argparse.Action):
    """An old option name that still works, hidden from help, with a note to use the new one."""

    def __init__(self, option_strings, dest, *, new_name: str, **kwargs):
        self.new_name = new_name
        super().__init__(option_strings, dest, help=argparse.SUPPRESS, **kwargs)

    def __call__(self, parser, namespace, values, option_string=None):
        print(f"stridecast: `{option_string}` is deprecated; write `{self.new_name}`.",
              file=sys.stderr)
        setattr(namespace, self.dest, values)


class _Parser(argparse.ArgumentParser):
    """argparse, with a hint when a value starting with '-' was taken for an option."""

    def error(self, message: str):
        if "expected one argument" in message:
            message += (" (a value starting with '-' is written with '=', e.g. "
                        "`--state=-3.6,0,0,0`)")
        super().error(message)


# A value such as "-3.6,1" or "-.5" or "-inf": argparse would take it for an option.
_NEGATIVE_VALUE = re.compile(r"^-(\d|\.\d|inf|nan)", re.IGNORECASE)


def _join_negative_values(parser: argparse.ArgumentParser, argv: list[str]) -> list[str]:
    """Rewrite `--opt -3.6,1` as `--opt=-3.6,1` for options that take a value."""
    takes_value = set()
    stack = [parser]
    while stack:
        current = stack.pop()
        for action in current._actions:
            if isinstance(action, argparse._SubParsersAction):
                stack.extend(action.choices.values())
            elif action.nargs != 0 and action.option_strings:
                takes_value.update(o for o in action.option_strings if o.startswith("--"))
    joined: list[str] = []
    index = 0
    while index < len(argv):
        token = argv[index]
        following = argv[index + 1] if index + 1 < len(argv) else None
        if token in takes_value and following is not None and _NEGATIVE_VALUE.match(following):
            joined.append(f"{token}={following}")
            index += 2
            continue
        joined.append(token)
        index += 1
    return joined


def _formatter(prog: str) -> argparse.HelpFormatter:
    return argparse.RawDescriptionHelpFormatter(prog, max_help_position=32)


def _add(subparsers, name: str, summary: str, example: str, handler: str):
    parser = subparsers.add_parser(
        name, help=summary, description=f"{summary}\n\nexample:\n  {example}",
        formatter_class=_formatter,
    )
    parser.set_defaults(handler=handler)
    return parser


def _add_state_options(parser: argparse.ArgumentParser) -> None:
    group = parser.add_mutually_exclusive_group(required=True)
    group.add_argument("--state", action="append", metavar="X1,X2,...",
                       help="initial state, comma-separated; repeat for a batch")
    group.add_argument("--state-file", metavar="FILE",
                       help="initial state(s) from a .npy file, shape (d,) or (B, d)")
    parser.add_argument("--off-grid", choices=("interpolate", "nearest", "error"),
                        default="interpolate", help="what to do between grid times "
                        "(default: %(default)s)")
    parser.add_argument("--dtype", choices=("float32", "float64"), default="float32",
                        help="arithmetic of the networks: float32 is faster, float64 "
                        "closer to the exported weights (default: %(default)s)")
    parser.add_argument("--json", action="store_true", help="print JSON instead of a table")
    parser.add_argument("--caution", action="store_true",
                        help="print the caution even if this session has shown it already")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="stridecast", formatter_class=_formatter,
        description="Deploy learned multi-scale flow-map time-steppers.\n\n" + CAUTION,
        epilog=EXIT_CODES,
    )
    parser.add_argument("--version", action="version", version=f"stridecast {__version__}")
    parser.add_argument("--caution", action=_ShowCaution,
                        help="print the caution about learned steppers and exit")
    subparsers = parser.add_subparsers(dest="command", metavar="COMMAND")

    inspect = _add(subparsers, "inspect", "Show a bundle's levels, operators and figures; "
                   "re-verify its checksums.", "stridecast inspect crane-demo.bundle",
                   "stridecast.commands_runtime:inspect_command")
    inspect.add_argument("bundle", nargs="?", help="bundle directory")
    inspect.add_argument("--demo", action="store_true", help="the bundle shipped in the package")
    inspect.add_argument("--json", action="store_true", help="print JSON")

    advance = _add(subparsers, "advance", "Forecast the state at one time.",
                   "stridecast advance crane-demo.bundle --state 3,-24,0,0 --time 12.5",
                   "stridecast.commands_runtime:advance_command")
    advance.add_argument("bundle", nargs="?", help="bundle directory")
    advance.add_argument("--demo", action="store_true", help="the bundle shipped in the package")
    when = advance.add_mutually_exclusive_group(required=True)
    when.add_argument("--time", type=float, metavar="T",
                      help="time to reach, ≥ 0, in the bundle's time unit")
    when.add_argument("--t", type=float, dest="time", action=_DeprecatedAlias,
                      new_name="--time")
    _add_state_options(advance)

    forecast = _add(subparsers, "forecast", "Forecast the state at many times (dense output).",
                    "stridecast forecast crane-demo.bundle --state 3,-24,0,0 --until 60 "
                    "--every 0.5 --out forecast.csv",
                    "stridecast.commands_runtime:forecast_command")
    forecast.add_argument("bundle", nargs="?", help="bundle directory")
    forecast.add_argument("--demo", action="store_true", help="the bundle shipped in the package")
    times = forecast.add_mutually_exclusive_group(required=True)
    times.add_argument("--times", metavar="T1,T2,...", help="comma-separated times")
    times.add_argument("--until", type=float, help="last time of an evenly spaced grid")
    forecast.add_argument("--every", type=float, help="spacing of the grid given by --until")
    forecast.add_argument("--out", metavar="FILE", help="write .csv or .npy instead of printing")
    _add_state_options(forecast)

    _register_optional(subparsers)
    return parser


def _register_optional(subparsers) -> None:
    """Commands of the other parts; each module adds its own parser."""
    from . import commands_ensemble, commands_optional

    commands_optional.register(subparsers, _add, _DeprecatedAlias)
    commands_ensemble.register(subparsers, _add)


def _resolve(handler: str) -> Handler:
    module_name, function_name = handler.split(":")
    module = __import__(module_name, fromlist=[function_name])
    return getattr(module, function_name)


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    argv = list(sys.argv[1:] if argv is None else argv)
    arguments = parser.parse_args(_join_negative_values(parser, argv))
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
