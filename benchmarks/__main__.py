"""Entry point of ``python -m benchmarks``."""

import sys

from .cli import main

sys.exit(main())
