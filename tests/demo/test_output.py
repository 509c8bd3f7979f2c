"""What the demo prints and records (stridecast/demo/output.py).

The printed commands are read back by the shell's own splitting (`shlex.split`) and the CLI's
argparse parser; the curl body by `json` and the service's pydantic request model; report.json
by `json`. The evaluation is a small hand-made one: only the formatting is under test.
"""

from __future__ import annotations

import json
import shlex
from pathlib import Path

import numpy as np
import pytest

from stridecast.cli import build_parser
from stridecast.demo.evaluation import Evaluation
from stridecast.demo.output import (
    add_to_report,
    demo_figures,
    format_commands,
    format_hybrid,
    format_table,
)
from stridecast.demo.settings import FULL, QUICK, TABLE_HORIZONS

EXAMPLE = np.array([3.61784, -23.93741, 0.0, -0.012345])


def _evaluation(*, hierarchical_wins: bool = True) -> Evaluation:
    table, hybrid = [], []
    for number, horizon in enumerate(TABLE_HORIZONS):
        error = 0.001 * (number + 1)
        table.append({"horizon": horizon, "evaluations": number + 2, "plan": [[1, 1]],
                      "finest_evaluations": round(horizon / 0.04),
                      "position_rmse": error if hierarchical_wins else 10 * error,
                      "finest_position_rmse": 2 * error, "runtime_ms": 0.5,
                      "finest_ms": 12.0, "reference_ms": 30.0})
        hybrid.append({"horizon": horizon, "evaluations": number, "plan": [[25, 1]],
                       "remainder": 0.6, "vector_field_evaluations": 6 * (number + 1),
                       "position_rmse": error / 3, "runtime_ms": 2.0})
    states = np.vstack([EXAMPLE, EXAMPLE + 1])
    return Evaluation(states=states, grid=np.zeros(1), truth=np.zeros((1, 2, 4)),
                      finest=np.zeros((1, 2, 4)), example_forecast=np.zeros((1, 4)),
                      table=tuple(table), hybrid=tuple(hybrid), curves={},
                      check={"horizons": list(TABLE_HORIZONS)}, strides=(1, 5, 25),
                      validated_horizon=12.5)


def _data_lines(text: str) -> list[str]:
    # Rows are indented and start with the horizon; a heading like "4. Hybrid" is not one.
    return [line for line in text.splitlines() if line.startswith("   ") and line.split()
            and line.split()[0].replace(".", "", 1).isdigit()]


def test_the_table_has_one_row_per_horizon_and_notes_a_loss_only_when_there_is_one():
    text = format_table(_evaluation(), FULL)
    rows = _data_lines(text)
    assert [float(row.split()[0]) for row in rows] == list(TABLE_HORIZONS)
    assert rows[0].split()[1:3] == ["2", "15"]  # hierarchical, finest evaluations
    assert "12.5 s" in text and "NOT more accurate" not in text and "QUICK" not in text
    worse = format_table(_evaluation(hierarchical_wins=False), QUICK)
    assert "NOT more accurate" in worse and "QUICK MODE" in worse
    unrecorded = format_table(Evaluation(**{**_evaluation().__dict__,
                                            "validated_horizon": None}), FULL)
    assert "not recorded" in unrecorded


def test_the_hybrid_table_pairs_each_hybrid_row_with_its_plain_one():
    rows = _data_lines(format_hybrid(_evaluation()))
    assert len(rows) == len(TABLE_HORIZONS)
    first = rows[0].split()
    assert first[:3] == ["0.6", "0", "6"] and first[3:5] == ["0.000333", "0.001"]


def test_the_printed_commands_parse_with_the_cli_and_the_service(tmp_path):
    from stridecast.service.schemas import AdvanceRequest

    bundle = tmp_path / "with space" / "crane-demo.bundle"
    text = format_commands(bundle, _evaluation())
    commands = [line.strip() for line in text.splitlines()[1:] if line.strip()]
    parser = build_parser()
    parsed = [parser.parse_args(shlex.split(line)[1:]) for line in commands[:3]]
    assert parsed[0].bundle == str(bundle)
    # The state is rounded to 4 decimals; the negative value survives thanks to '='.
    assert [float(v) for v in parsed[0].state[0].split(",")] == [3.6178, -23.9374, 0.0,
                                                                   -0.0123]
    assert parsed[0].time == TABLE_HORIZONS[-2]
    assert parsed[1].until == TABLE_HORIZONS[-1] and parsed[1].every == 0.2
    curl = shlex.split(commands[3])
    assert curl[curl.index("-X") + 2] == (
        "http://127.0.0.1:8000/v1/models/crane-demo/advance")  # the folder less .bundle
    body = AdvanceRequest.model_validate(json.loads(curl[curl.index("-d") + 1]))
    assert body.t == TABLE_HORIZONS[-2] and body.state == [3.6178, -23.9374, 0.0, -0.0123]


def test_figures_are_json_and_join_an_existing_report(tmp_path):
    bundle = tmp_path / "b.bundle"
    bundle.mkdir()
    (bundle / "report.json").write_text(json.dumps({"training": {"epochs": 3}}))
    figures = demo_figures(_evaluation(), QUICK)
    assert figures["mode"] == "quick" and figures["settings"]["epochs"] == QUICK.epochs
    add_to_report(bundle, figures)
    report = json.loads((bundle / "report.json").read_text())
    assert report["training"] == {"epochs": 3}  # kept
    # JSON round trip: tuples become lists, nothing else changes.
    assert report["demo"] == json.loads(json.dumps(figures))
    assert [path.name for path in bundle.iterdir()] == ["report.json"]  # no temporary left


def test_a_report_is_created_when_there_is_none(tmp_path):
    add_to_report(tmp_path, {"a": 1})
    assert json.loads((tmp_path / "report.json").read_text()) == {"demo": {"a": 1}}


def test_non_finite_figures_are_refused_and_leave_the_report_alone(tmp_path):
    (tmp_path / "report.json").write_text('{"x": 1}')
    with pytest.raises(ValueError):
        add_to_report(tmp_path, {"error": float("nan")})  # strict JSON has no NaN (RFC 8259)
    assert Path(tmp_path / "report.json").read_text() == '{"x": 1}'
