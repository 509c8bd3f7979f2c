"""`stridecast inspect`, `advance` and `forecast` on a bundle the test builds.

Expected states come from scipy.linalg.expm (matrix-exponential solution of x' = A x).
"""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pytest
from scipy.linalg import expm

from stridecast.cli import main
from tests.builders import linear_bundle, oscillator_matrix


@pytest.fixture
def bundle(tmp_path):
    return linear_bundle(tmp_path / "osc.bundle", oscillator_matrix(), base_step=0.1,
                         strides=(1, 4, 16))


def test_inspect_lists_levels_and_checksums(bundle, capsys):
    assert main(["inspect", str(bundle)]) == 0
    text = capsys.readouterr().out
    assert "levels" in text and "MatMul×1" in text and "ok" in text
    assert main(["inspect", str(bundle), "--json"]) == 0
    description = json.loads(capsys.readouterr().out)
    assert [level["stride"] for level in description["levels"]] == [1, 4, 16]
    assert description["levels"][0]["parameters"] == 4


def test_inspect_reports_tampering(bundle, capsys):
    (bundle / "levels" / "stride-00004.onnx").write_bytes(b"\x08\x07")
    assert main(["inspect", str(bundle)]) == 1
    assert "checksum" in capsys.readouterr().err


def test_advance_prints_state_and_caution(bundle, capsys):
    assert main(["advance", str(bundle), "--state", "1,0", "--t", "2.0", "--dtype", "float64",
                 "--json"]) == 0
    captured = capsys.readouterr()
    answer = json.loads(captured.out)
    # Reference: scipy.linalg.expm.
    assert np.allclose(answer["state"], expm(oscillator_matrix() * 2.0) @ [1, 0], atol=1e-12)
    assert answer["plan"]["steps"] == [[16, 1], [4, 1]]
    assert "not a safety function" in captured.err


def test_forecast_writes_csv(bundle, tmp_path, capsys):
    out = tmp_path / "f.csv"
    assert main(["forecast", str(bundle), "--state", "1,0", "--until", "3", "--every", "0.5",
                 "--out", str(out)]) == 0
    table = np.loadtxt(out, delimiter=",", skiprows=1)
    assert table.shape == (7, 3)
    # Reference: closed form of the oscillator, x = cos(2t).
    assert np.allclose(table[:, 1], np.cos(2 * table[:, 0]), atol=1e-5)


@pytest.mark.parametrize(("arguments", "message"), [
    (["--state", "1,0,0", "--t", "1"], "expected (2,) or (batch, 2)"),
    (["--state", "1,x", "--t", "1"], "not a comma-separated list"),
    (["--state", "1,0", "--t", "-1"], "expected a finite time"),
])
def test_advance_bad_input(bundle, capsys, arguments, message):
    assert main(["advance", str(bundle), *arguments]) == 1
    assert message in capsys.readouterr().err


def test_every_command_has_help_with_example():
    for command in ("inspect", "advance", "forecast"):
        result = subprocess.run([sys.executable, "-m", "stridecast", command, "--help"],
                                capture_output=True, text=True, check=True)
        assert "example:" in result.stdout


def test_advance_says_evaluation_in_the_singular_for_one(bundle, capsys):
    # t = 1.6 = one stride-16 step of 0.1: a single network evaluation.
    assert main(["advance", str(bundle), "--state", "1,0", "--t", "1.6"]) == 0
    out = capsys.readouterr().out
    assert "; 1 network evaluation)" in out
