"""Entry point of ``python -m stridecast.benchmarks``."""

import sys

from .cli import main

sys.exit(main())
