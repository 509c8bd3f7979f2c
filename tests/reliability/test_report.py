"""The collector and writer of docs/reliability.md (tests/reliability/report.py, conftest.py)."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

from tests.reliability.report import (
    FORBIDDEN,
    FOUND,
    OUTPUT_VARIABLE,
    README_END,
    README_START,
    Collector,
    readme_summary,
    render,
    report_target,
    update_readme,
)

ROOT = Path(__file__).resolve().parents[2]


def test_rows_with_the_same_area_and_description_add_their_cases():
    collector = Collector()
    collector.record("A", "tried", 2, "refused")
    collector.record("B", "other", 1, "fine", summary="B is fine")
    collector.record("A", "tried", 3, "refused")
    assert [(row.area, row.cases) for row in collector.rows] == [("A", 5), ("B", 1)]
    with pytest.raises(ValueError, match=r"merged rows must agree"):
        collector.record("A", "tried", 1, "accepted")


@pytest.mark.parametrize("text", ["the server crashed", "Crash", "it hung", "hangs",
                                  "HTTP 500", "500 errors", "status 500."])
def test_rows_that_report_a_failure_are_refused(text):
    with pytest.raises(ValueError, match=r"reports a failure"):
        Collector().record("Area", "tried", 1, text)


@pytest.mark.parametrize("text", ["1,500 served", "p50 0.500 ms", "5003 requests",
                                  "15000 cases", "change"])
def test_numbers_that_merely_contain_500_are_allowed(text):
    Collector().record("Area", "tried", 1, text)


def test_render_writes_summary_table_and_method():
    collector = Collector()
    collector.record("Bundles: paths", "a | b", 1_234, "all refused", summary="x refused")
    text = render(collector.rows, machine="Measured on a test.", date="2001-01-01",
                  known=(("test_thing", "the thing is not refused yet."),))
    assert text.startswith("# Reliability\n")
    assert "1 issue these tests found are listed under Known issues" in text
    assert "## Known issues" in text and "- `test_thing`: the thing is not refused yet." in text
    assert "**Summary.** 1,234 hostile or concurrent cases of 1 kinds, in 1 areas (Bundles)" in text
    assert "x refused." in text
    assert "| Bundles: paths | a \\| b | 1,234 | all refused |" in text
    assert "## How the figures are made" in text and "## Longer fuzzing" in text


def test_the_fixed_text_of_the_document_reports_no_failure():
    text = render((), machine="Measured on a test.", date="2001-01-01")
    assert FORBIDDEN.search(text) is None
    assert f"found {len(FOUND)} groups of bugs, all fixed" in text


def test_a_partial_run_does_not_write_the_document(tmp_path):
    target = tmp_path / "reliability.md"
    environment = {**os.environ, OUTPUT_VARIABLE: str(target)}
    # Only this module's first test: the other modules are not collected, so no table.
    node = f"{Path(__file__).relative_to(ROOT)}::" \
        "test_rows_with_the_same_area_and_description_add_their_cases"
    done = subprocess.run([sys.executable, "-m", "pytest", "-q", "-p", "no:cacheprovider",
                           node], cwd=ROOT, env=environment, capture_output=True, text=True,
                          timeout=120)
    assert done.returncode == 0, done.stdout + done.stderr
    assert not target.exists()


def test_a_plain_test_run_has_nowhere_to_write():
    # Tests never modify tracked files: without the variable there is no target at all.
    assert report_target({}) is None
    assert report_target({OUTPUT_VARIABLE: ""}) is None
    assert report_target({OUTPUT_VARIABLE: "/tmp/x.md"}) == Path("/tmp/x.md")


def test_the_readme_summary_is_the_documents():
    # The README's figures are copied from docs/reliability.md by the report command; the two
    # tracked files must agree.
    document = (ROOT / "docs" / "reliability.md").read_text(encoding="utf-8")
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    assert update_readme(readme, readme_summary(document)) == readme


def test_update_readme_replaces_only_the_marked_block():
    collector = Collector()
    collector.record("Bundles: paths", "a", 3, "all refused")
    summary = readme_summary(render(collector.rows, machine="m.", date="d"))
    assert summary.startswith("3 hostile or concurrent cases")
    assert summary.endswith("(listed in docs/reliability.md).")
    readme = f"# Title\n\n{README_START}\nold figures\n{README_END}\n\nrest\n"
    updated = update_readme(readme, summary)
    assert updated == f"# Title\n\n{README_START}\n{summary}\n{README_END}\n\nrest\n"
    with pytest.raises(ValueError, match=r"README.md lacks the markers"):
        update_readme("# Title\n", summary)
    with pytest.raises(ValueError, match=r"no line starting"):
        readme_summary("# Reliability\n")
