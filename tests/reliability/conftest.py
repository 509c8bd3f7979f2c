"""Session-level collector of the reliability tests and the writer of their table.

Tests record rows through the `reliability` fixture. A plain test run writes nothing (tests
never modify tracked files). Only when `STRIDECAST_RELIABILITY_DOC` names a file, as
`python -m tests.reliability.report` does, is the table written there at the end of the
session, and only if every test in this folder was collected, ran and passed (or was an
expected failure), so a partial or failing run never produces figures.
"""

from __future__ import annotations

import datetime
import os
from pathlib import Path

import pytest

from tests.reliability.report import FORBIDDEN, Collector, machine_line, render, report_target

HERE = Path(__file__).resolve().parent
COLLECTOR = pytest.StashKey[Collector]()
ITEMS = pytest.StashKey[set]()
PASSED = pytest.StashKey[set]()
PROBLEMS = pytest.StashKey[list]()
KNOWN = pytest.StashKey[dict]()
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
    config.stash[KNOWN] = {}


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
    elif report.skipped and hasattr(report, "wasxfail"):
        # An expected failure: a known bug, listed under the table until it is fixed.
        config.stash[PASSED].add(report.nodeid)
        config.stash[KNOWN][report.nodeid] = report.wasxfail
    elif report.when == "call":
        config.stash[PASSED].add(report.nodeid)


def pytest_sessionfinish(session: pytest.Session, exitstatus: int) -> None:
    config = session.config
    if COLLECTOR not in config.stash:
        return
    items = config.stash[ITEMS]
    problems = list(config.stash[PROBLEMS])
    if items and not items <= config.stash[PASSED]:
        problems.append(f"{len(items - config.stash[PASSED])} reliability tests did not pass")
    rows = config.stash[COLLECTOR].rows
    if not items or not rows:
        return
    target = report_target(os.environ)
    if target is None:
        return
    text = ""
    if not problems:
        date = datetime.datetime.now(datetime.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
        known = tuple((nodeid.split("::")[-1], reason)
                      for nodeid, reason in sorted(config.stash[KNOWN].items()))
        text = render(rows, machine=machine_line(), date=date, known=known)
        forbidden = FORBIDDEN.search(text)
        if forbidden:
            problems.append(f"the document would say {forbidden.group(0)!r}")
    reporter = config.pluginmanager.get_plugin("terminalreporter")
    if problems:
        if reporter is not None:
            reporter.write_line(f"{target.name} not written: {'; '.join(problems[:3])}")
        return
    target.parent.mkdir(parents=True, exist_ok=True)
    staging = target.with_name(target.name + ".tmp")
    staging.write_text(text, encoding="utf-8")
    os.replace(staging, target)
    if reporter is not None:
        reporter.write_line(f"reliability table ({len(rows)} rows) written to {target}")


@pytest.fixture(scope="session")
def reliability(request: pytest.FixtureRequest) -> Collector:
    """The session's collector: `reliability.record(area, tried, cases, outcome)`."""
    return request.config.stash[COLLECTOR]
