"""The options of `stridecast demo` (and `python -m stridecast.demo`), defined once.

Light on purpose: the CLI builds its parser from here without importing the demo's stages.
"""

from __future__ import annotations

import argparse
from pathlib import Path

from .scenarios import DEFAULT_SCENARIO, help_text, scenario_option


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Add the options of `stridecast demo` to `parser`."""
    parser.add_argument("--scenario", type=scenario_option, default=DEFAULT_SCENARIO,
                        metavar="NAME", help=help_text())
    parser.add_argument("--out", type=Path, default=None, metavar="DIR",
                        help="bundle folder to write (default: ./NAME-demo.bundle, e.g. "
                        "./crane-demo.bundle)")
    parser.add_argument("--quick", action="store_true",
                        help="smaller data and networks: the same steps in about 30 s (crane) "
                        "or a minute (mooring), at a lower accuracy")
    parser.add_argument("--overwrite", action="store_true",
                        help="replace an existing bundle folder at --out")
    parser.add_argument("--no-progress", action="store_true", help="no progress bars")
    parser.add_argument("--plots-dir", type=Path, default=None, metavar="DIR",
                        help="where the figures go (default: the bundle folder)")
