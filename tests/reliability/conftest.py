"""Session-level collector of the reliability tests and the writer of docs/reliability.md.

Tests record rows through the `reliability` fixture. At the end of the session the table is
written, but only if every test in this folder was collected, ran and passed (or was an
expected failure), so a partial or failing run never replaces the published figures.
"""

from __future__ import annotations

import datetime
import os
from pathlib import Path

import pytest

from tests.reliability.report import Collector, machine_line, render

HERE = Path(__file__).resolve().parent
COLLECTOR = pytest.StashKey[Collector]()
ITEMS = pytest.StashKey[set]()
PASSED = pytest.StashKey[set]()
PROBLEMS = pytest.StashKey[list]()
# Where the table goes; a test of this machinery points it elsewhere.
OUTPUT_VARIABLE = "STRIDECAST_RELIABILITY_DOC"
# pytest_runtest_logreport receives no config; the session's is kept here by pytest_configure.
_CONFIG: dict[str, pytest.Config] = {}


def _ours(nodeid_path: Path) -> bool:
    return HERE in nodeid_path.resolve().parents or nodeid_path.resolve() == HERE


def pytest_configure(config: pytest.Config) -> None:
    _CONFIG["config"] = config
    config.stash[COLLECTOR] = Collector()
    config.stash[ITEMS] = set()
    config.stash[PASSED] = set()
    config.stash[PROBLEMS] = []


def pytest_collection_modifyitems(session: pytest.Session, config: pytest.Config,
                                  items: list[pytest.Item]) -> None:
    config.stash[ITEMS] = {item.nodeid for item in items if _ours(Path(item.path))}
    modules = {Path(item.path).name for item in items if _ours(Path(item.path))}
    missing = sorted(path.name for path in HERE.glob("test_*.py") if path.name not in modules)
    if missing:
        config.stash[PROBLEMS].append(f"modules not collected: {missing}")


def pytest_deselected(items: list[pytest.Item]) -> None:
    for item in items:
        if _ours(Path(item.path)):
            item.config.stash[PROBLEMS].append(f"deselected: {item.nodeid}")


def pytest_runtest_logreport(report: pytest.TestReport) -> None:
    config = _CONFIG.get("config")
    if config is None:
        return
    if report.failed:
        config.stash[PROBLEMS].append(f"{report.when} failed: {report.nodeid}")
    elif report.skipped and not hasattr(report, "wasxfail"):
        config.stash[PROBLEMS].append(f"skipped: {report.nodeid}")
    elif report.when == "call" or (report.skipped and hasattr(report, "wasxfail")):
        config.stash[PASSED].add(report.nodeid)


def pytest_sessionfinish(session: pytest.Session, exitstatus: int) -> None:
    config = session.config
    items = config.stash.get(ITEMS, set())
    problems = config.stash.get(PROBLEMS, [])
    complete = bool(items) and not problems and items <= config.stash.get(PASSED, set())
    rows = config.stash[COLLECTOR].rows if COLLECTOR in config.stash else ()
    if not complete or not rows:
        return
    target = Path(os.environ.get(OUTPUT_VARIABLE) or config.rootpath / "docs" / "reliability.md")
    date = datetime.datetime.now(datetime.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    text = render(rows, machine=machine_line(), date=date)
    target.parent.mkdir(parents=True, exist_ok=True)
    staging = target.with_name(target.name + ".tmp")
    staging.write_text(text, encoding="utf-8")
    os.replace(staging, target)


@pytest.fixture(scope="session")
def reliability(request: pytest.FixtureRequest) -> Collector:
    """The session's collector: `reliability.record(area, tried, cases, outcome)`."""
    return request.config.stash[COLLECTOR]
