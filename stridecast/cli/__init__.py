"""The `stridecast` command line (entry point `stridecast.cli:main`).

`main` builds one parser from the commands' modules (`runtime_commands`, `optional_commands`,
`train_command`, `ensemble_command`); `parsing` holds the argparse helpers and `common` what
several commands share. No command module imports another.
"""

from .main import build_parser, main

__all__ = ["build_parser", "main"]
