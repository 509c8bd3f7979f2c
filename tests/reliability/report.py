"""The reliability table: rows recorded by the tests, rendered as docs/reliability.md.

Tests call `Collector.record`; rows with the same area and description merge (their case counts
add up), so each parametrized case can record itself. Rendering is a pure function of the rows.

Run as a command from the repository root, it regenerates the published figures::

    python -m tests.reliability.report            # docs/reliability.md and the README summary

It runs `pytest tests/reliability` with the table directed to a temporary file and, only if
every reliability test ran and passed, moves it to docs/reliability.md and copies its summary
into README.md between the ``reliability-summary`` markers. A plain test run writes nothing.
"""

from __future__ import annotations

import argparse
import os
import platform
import re
import subprocess
import sys
import tempfile
import threading
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np

# Where the conftest writes the table; unset (a plain test run), it goes nowhere.
OUTPUT_VARIABLE = "STRIDECAST_RELIABILITY_DOC"


def report_target(environ) -> Path | None:
    """The file to write the table to: `OUTPUT_VARIABLE` if set, otherwise none."""
    value = environ.get(OUTPUT_VARIABLE, "")
    return Path(value) if value else None


# The table reports what was refused or survived; words for the opposite would mean a test
# passed while something broke, so they are refused outright (500 as a lone number, not 1,500).
FORBIDDEN = re.compile(r"crash|\bhung\b|\bhang|(?<!\d)(?<!\d[.,])500(?!\d|[.,]\d)",
                       re.IGNORECASE)

HEADER = """# Reliability

<!-- Written by `python -m tests.reliability.report` after a complete, passing run of
     tests/reliability; hand edits are overwritten. -->
"""

METHOD = """## How the figures are made

- Every row is recorded by a test in `tests/reliability/` while it runs; the table is written
  only when all of those tests ran and passed (a partial run, `-k`, `-m` or a failure leaves
  the previous file alone). Regenerate this file and the README's summary with
  `python -m tests.reliability.report`; a plain test run writes nothing.
- "Nothing outside the bundle is opened": `builtins.open` and `os.open` are recorded during
  `load`, and a valid, checksum-matching model placed beside the bundle is watched through its
  access time (set to 2001 first; a control read proves the file system updates it).
- Memory of the reader: `tracemalloc` peak during `read_model`, bounded by a small multiple of
  the file size plus a constant. Memory of the service: `VmRSS` of the uvicorn process from
  `/proc/PID/status`, before and after.
- Latencies are wall-clock times seen by the client, on the machine named above, with the
  server and its clients sharing the same CPUs; they describe this run, not a guarantee.
- Batch invariance: float32 results may differ in the last bits between batch sizes because
  BLAS picks different kernels (and summation orders) for different matrix shapes; the
  tolerance is a few float32 ulps, and the table says how many rows were bitwise equal.
"""

# What these tests found while they were written; each is fixed and pinned by a test whose
# comment starts "Regression (found by this suite, fixed)".
FOUND = (
    "A manifest stride of 2^40 raised MemoryError, and a stride of 4,000,000 took about 50 s and "
    "1.5 GB at load (planner tables sized by the largest stride); strides are now bounded by "
    "`Limits.max_stride`.",
    "A level whose declared output no node produces raised KeyError at load, not "
    "ModelFormatError (and would have stopped the service at start).",
    "Local functions: a 1.5 KB level could inline into millions of nodes (fan-out 8, depth 7: "
    "92 s and 690 MB); inlining now stops at `max_graph_nodes`. Nested functions called twice "
    "got clashing value names, so valid models were refused.",
    "The compiled fast path let NumPy's TypeError or ValueError escape for an activation with "
    "an unknown attribute, a last layer of the wrong width, and layers whose widths do not "
    "chain (the last two found by the atheris harness).",
    "`advance` emitted NumPy divide-by-zero warnings on top of the NonFiniteError.",
    "Service: a body trickling past `request_timeout` was read to the end and answered 504; it "
    "now gets 408 when the budget runs out. A client leaving in the middle of its body was "
    "logged with a traceback and counted as a server error in /metrics; it now gets 400.",
)

FUZZING = """## Longer fuzzing

`fuzz/fuzz_onnx_reader.py` is an [atheris](https://github.com/google/atheris) harness running
the same check as the CI fuzz test: read the input, load it as the level of a one-level
bundle, then advance and forecast (atheris is not needed for CI):

```bash
pip install atheris
python fuzz/fuzz_onnx_reader.py --write-seeds fuzz/corpus   # torch exports, both exporters
python fuzz/fuzz_onnx_reader.py fuzz/corpus -max_total_time=3600 -rss_limit_mb=2048
```

Any exception other than `ModelFormatError` (including `UnsupportedOperatorError`) or another
`StridecastError` from a call, and any input whose traced peak memory in the reader exceeds the
bound above, stops the run; libFuzzer saves the input and prints its file name (pass that file
instead of the corpus to reproduce it). With tracemalloc on, expect about 140 inputs per second
on one core. While this suite was written, about 750,000 atheris inputs found two of the issues
listed above (the fast-path widths); 280,000 more after the fixes found nothing new.
"""


@dataclass(frozen=True)
class Row:
    """One line of the table."""

    area: str
    tried: str
    cases: int
    outcome: str
    summary: str = ""


class Collector:
    """Rows recorded during a test session, in first-recorded order."""

    def __init__(self) -> None:
        self._rows: dict[tuple[str, str], Row] = {}
        self._lock = threading.Lock()

    def record(self, area: str, tried: str, cases: int, outcome: str, *,
               summary: str = "") -> None:
        """Add a row, or add `cases` to the row with the same area and description.

        Parameters
        ----------
        area : str
            Part of the system, e.g. "Bundle paths".
        tried : str
            What was tried, in a phrase.
        cases : int
            How many cases this call covers.
        outcome : str
            What happened; rows that merge must report the same outcome.
        summary : str, optional
            A phrase for the summary at the top of the document.
        """
        for text in (area, tried, outcome, summary):
            if FORBIDDEN.search(text):
                raise ValueError(f"reliability row {text!r} reports a failure; the table only "
                                 "records behaviour that passed.")
        if isinstance(cases, bool) or not isinstance(cases, int) or cases < 1:
            raise ValueError(f"`cases` is {cases!r}; expected a positive integer.")
        key = (area, tried)
        with self._lock:
            previous = self._rows.get(key)
            if previous is None:
                self._rows[key] = Row(area, tried, cases, outcome, summary)
                return
            if previous.outcome != outcome:
                raise ValueError(f"row {key} was recorded with outcome {previous.outcome!r} "
                                 f"and now {outcome!r}; merged rows must agree.")
            self._rows[key] = replace(previous, cases=previous.cases + cases,
                                      summary=previous.summary or summary)

    @property
    def rows(self) -> tuple[Row, ...]:
        with self._lock:
            return tuple(self._rows.values())


def _cell(text: str) -> str:
    return text.replace("|", "\\|").replace("\n", " ")


def machine_line() -> str:
    """Where the figures were measured (Python, NumPy, OS, CPUs)."""
    import os

    try:
        cpus = len(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        cpus = os.cpu_count() or 1
    return (f"Measured with Python {platform.python_version()}, NumPy {np.__version__}, "
            f"{platform.system()} {platform.machine()}, {cpus} CPUs.")


def render(rows: tuple[Row, ...], *, machine: str, date: str,
           known: tuple[tuple[str, str], ...] = ()) -> str:
    """The whole of docs/reliability.md for `rows` and the known issues (test, reason)."""
    total = sum(row.cases for row in rows)
    areas = sorted({row.area.split(":")[0] for row in rows})
    phrases = [row.summary for row in rows if row.summary]
    summary = (
        f"**Summary.** {total:,} hostile or concurrent cases of {len(rows)} kinds, in "
        f"{len(areas)} areas ({', '.join(areas)}), are tried by the test suite on every CI "
        "run. Every malformed bundle, model file and request was refused with the documented "
        "error (`BundleError`, `ModelFormatError`, `NonFiniteError`, HTTP 4xx) and every valid "
        "one answered as computed directly by the runtime. "
        + ("; ".join(phrases) + "." if phrases else "")
    )
    summary += (f" Writing these tests found {len(FOUND)} groups of bugs, all fixed (listed "
                "below).")
    if known:
        plural = "s" if len(known) != 1 else ""
        summary += (f" {len(known)} issue{plural} these tests found are listed under Known "
                    "issues below.")
    lines = [HEADER, summary, "", f"{machine} Last written {date}.", "",
             "## What was tried", "",
             "| Area | What was tried | Cases | Outcome |", "|---|---|---:|---|"]
    lines += [f"| {_cell(row.area)} | {_cell(row.tried)} | {row.cases:,} | {_cell(row.outcome)} |"
              for row in rows]
    if known:
        lines += ["", "## Known issues", "",
                  f"Found by these tests and not fixed yet: {len(known)} tests marked "
                  "`xfail(strict=True)` in `tests/reliability/` state what should happen; each "
                  "fails today for the reason given (and fails loudly once fixed, so the marker "
                  "is removed).", ""]
        lines += [f"- `{name}`: {reason}" for name, reason in known]
    lines += ["", "## Found by these tests (fixed)", ""]
    lines += [f"- {item}" for item in FOUND]
    lines += ["", METHOD, FUZZING]
    return "\n".join(lines).rstrip() + "\n"


# README.md holds the summary between these markers; `update_readme` replaces what is between.
README_START = "<!-- reliability-summary:start (python -m tests.reliability.report) -->"
README_END = "<!-- reliability-summary:end -->"
SUMMARY_PREFIX = "**Summary.** "


def readme_summary(document: str) -> str:
    """The summary paragraph of a rendered document, worded for the README.

    Raises
    ------
    ValueError
        If the document has no summary line.
    """
    for line in document.splitlines():
        if line.startswith(SUMMARY_PREFIX):
            text = line[len(SUMMARY_PREFIX):]
            return (text.replace("(listed below)", "(listed in docs/reliability.md)")
                    .replace("under Known issues below", "under Known issues in "
                             "docs/reliability.md"))
    raise ValueError(f"the reliability document has no line starting {SUMMARY_PREFIX!r}.")


def update_readme(readme: str, summary: str) -> str:
    """`readme` with the text between the summary markers replaced by `summary`.

    Raises
    ------
    ValueError
        If the markers are missing or out of order.
    """
    start, end = readme.find(README_START), readme.find(README_END)
    if start < 0 or end < start:
        raise ValueError(f"README.md lacks the markers {README_START!r} … {README_END!r} "
                         "(in that order); expected them around the reliability summary.")
    head = readme[: start + len(README_START)]
    return f"{head}\n{summary}\n{readme[end:]}"


def _replace(path: Path, text: str) -> None:
    staging = path.with_name(f"{path.name}.tmp-{os.getpid()}")
    staging.write_text(text, encoding="utf-8")
    os.replace(staging, path)


def main(argv: list[str] | None = None) -> int:
    """Run the reliability tests and publish their table and summary; returns the exit code."""
    root = Path(__file__).resolve().parents[2]
    parser = argparse.ArgumentParser(
        prog="python -m tests.reliability.report",
        description="Run tests/reliability and, if every test passes, write the table to "
                    "docs/reliability.md and its summary into README.md.",
    )
    parser.add_argument("--doc", type=Path, default=root / "docs" / "reliability.md",
                        help="where to write the table (default: %(default)s)")
    parser.add_argument("--readme", type=Path, default=root / "README.md",
                        help="the README whose summary to replace (default: %(default)s)")
    arguments = parser.parse_args(argv)
    with tempfile.TemporaryDirectory() as scratch:
        table = Path(scratch) / "reliability.md"
        environment = {**os.environ, OUTPUT_VARIABLE: str(table)}
        done = subprocess.run([sys.executable, "-m", "pytest", "-q", "-p", "no:cacheprovider",
                               "tests/reliability"], cwd=root, env=environment, check=False)
        if done.returncode != 0 or not table.is_file():
            print(f"reliability tests did not all pass (exit {done.returncode}); "
                  f"{arguments.doc} and {arguments.readme} left unchanged.", file=sys.stderr)
            return done.returncode or 1
        document = table.read_text(encoding="utf-8")
    readme = update_readme(arguments.readme.read_text(encoding="utf-8"),
                           readme_summary(document))
    _replace(arguments.doc, document)
    _replace(arguments.readme, readme)
    print(f"wrote {arguments.doc} and the summary in {arguments.readme}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
