"""The caution every user of a learned stepper reads, and when the command line shows it.

`CAUTION` is the one copy of the text (the README quotes it; a test keeps them equal).
`advance` and `forecast` show it once per session of use, remembered by a marker file in
the user's cache folder, so scripts calling them in a loop are not flooded with it.
"""

from __future__ import annotations

import os
import time
from pathlib import Path

CAUTION = (
    "Caution: a learned stepper is an approximation, valid inside its training envelope and "
    "its validated horizon (both recorded in the bundle and shown by `stridecast inspect`). "
    "It is not a safety function: do not let it stand in for interlocks, limit switches or "
    "certified control. Lifting operations and other hazardous work follow local codes and "
    "licensed practice first."
)

# A session of use ends after this long without the caution being shown (8 hours: a
# working day, so it comes back each morning).
SESSION_SECONDS = 8 * 3600
MARKER_NAME = "caution-shown"


def cache_folder() -> Path:
    """`$XDG_CACHE_HOME/stridecast`, or `~/.cache/stridecast` when the variable is unset."""
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return Path(base) / "stridecast"


def due(*, now: float | None = None) -> bool:
    """Whether this session has not shown the caution yet (no marker, or an old one)."""
    marker = cache_folder() / MARKER_NAME
    try:
        shown = marker.stat().st_mtime
    except OSError:
        return True
    return (time.time() if now is None else now) - shown > SESSION_SECONDS


def remember_shown() -> None:
    """Touch the marker; a cache folder that cannot be written means the caution shows again."""
    folder = cache_folder()
    try:
        folder.mkdir(parents=True, exist_ok=True)
        (folder / MARKER_NAME).touch()
    except OSError:
        pass  # read-only home or cache: showing the caution each time is the safe side
