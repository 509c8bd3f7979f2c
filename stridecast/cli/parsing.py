"""argparse helpers shared by every command's parser: the parser class, option actions and
the way a command is added. No command imports another; they all import from here."""

from __future__ import annotations

import argparse
import re
import sys
from collections.abc import Callable

from stridecast.caution import CAUTION
from stridecast.runtime.validation import DTYPES, OFF_GRID_POLICIES

EXIT_CODES = (
    "exit codes, the same for every command:\n"
    "  0  success\n"
    "  1  failure: bad input, a bundle that does not load, a port in use, a missing extra\n"
    "  2  usage: unknown option, missing or malformed argument\n"
    "  130  interrupted (Ctrl-C)"
)

Handler = Callable[[argparse.Namespace], int]


class ShowCaution(argparse.Action):
    """`--caution`: print the caution on demand, like `--version` prints the version."""

    def __init__(self, option_strings, dest, **kwargs):
        super().__init__(option_strings, dest, nargs=0, default=argparse.SUPPRESS, **kwargs)

    def __call__(self, parser, namespace, values, option_string=None):
        print(CAUTION)
        parser.exit(0)


class DeprecatedAlias(argparse.Action):
    """An old option name that still works, hidden from help, with a note to use the new one."""

    def __init__(self, option_strings, dest, *, new_name: str, **kwargs):
        self.new_name = new_name
        super().__init__(option_strings, dest, help=argparse.SUPPRESS, **kwargs)

    def __call__(self, parser, namespace, values, option_string=None):
        print(f"stridecast: `{option_string}` is deprecated; write `{self.new_name}`.",
              file=sys.stderr)
        setattr(namespace, self.dest, values)


class Parser(argparse.ArgumentParser):
    """argparse, with a hint when a value starting with '-' was taken for an option."""

    def error(self, message: str):
        if "expected one argument" in message:
            message += (" (a value starting with '-' is written with '=', e.g. "
                        "`--state=-3.6,0,0,0`)")
        super().error(message)


# A value such as "-3.6,1" or "-.5" or "-inf": argparse would take it for an option.
_NEGATIVE_VALUE = re.compile(r"^-(\d|\.\d|inf|nan)", re.IGNORECASE)


def join_negative_values(parser: argparse.ArgumentParser, argv: list[str]) -> list[str]:
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


def formatter(prog: str) -> argparse.HelpFormatter:
    return argparse.RawDescriptionHelpFormatter(prog, max_help_position=32)


def add_command(subparsers, name: str, summary: str, example: str, handler: str):
    parser = subparsers.add_parser(
        name, help=summary, description=f"{summary}\n\nexample:\n  {example}",
        formatter_class=formatter,
    )
    parser.set_defaults(handler=handler)
    return parser


def add_state_options(parser: argparse.ArgumentParser) -> None:
    group = parser.add_mutually_exclusive_group(required=True)
    group.add_argument("--state", action="append", metavar="X1,X2,...",
                       help="initial state, comma-separated; repeat for a batch")
    group.add_argument("--state-file", metavar="FILE",
                       help="initial state(s), shape (d,) or (B, d): .npy, .csv or .txt "
                       "(one state per row) or .json (a list, or a list of lists)")
    parser.add_argument("--off-grid", choices=OFF_GRID_POLICIES,
                        default="interpolate", help="what to do between grid times "
                        "(default: %(default)s)")
    parser.add_argument("--dtype", choices=DTYPES, default="float32",
                        help="arithmetic of the networks: float32 is faster, float64 "
                        "closer to the exported weights (default: %(default)s)")
    parser.add_argument("--json", action="store_true", help="print JSON instead of a table")
    parser.add_argument("--caution", action="store_true",
                        help="print the caution even if this session has shown it already")
