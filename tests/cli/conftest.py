"""Every CLI test keeps the caution's session marker in its own temporary cache folder."""

from tests.builders import private_cache  # noqa: F401  (an autouse fixture)
