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
from tests.builders import field_bundle, linear_bundle, oscillator_matrix, sine_basis


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
    captured = capsys.readouterr()
    assert "checksum" in captured.err and "stride-00004.onnx" in captured.err
    # Every level gets its status; the untouched ones still read "ok".
    lines = [line.split() for line in captured.out.splitlines() if line.strip()[:1].isdigit()]
    status = {int(line[0]): ("MISMATCH" if "MISMATCH" in line else "ok") for line in lines}
    assert status == {1: "ok", 4: "MISMATCH", 16: "ok"}
    assert main(["inspect", str(bundle), "--json"]) == 1
    description = json.loads(capsys.readouterr().out)
    assert [level["checksum"] for level in description["levels"]] == ["ok", "mismatch", "ok"]
    assert description["checksums_ok"] is False


def test_advance_prints_state_and_no_caution_with_json(bundle, capsys):
    assert main(["advance", str(bundle), "--state", "1,0", "--time", "2.0", "--dtype", "float64",
                 "--json"]) == 0
    captured = capsys.readouterr()
    answer = json.loads(captured.out)
    # Reference: scipy.linalg.expm.
    assert np.allclose(answer["state"], expm(oscillator_matrix() * 2.0) @ [1, 0], atol=1e-12)
    assert answer["plan"]["steps"] == [[16, 1], [4, 1]]
    assert "not a safety function" not in captured.err


def test_forecast_writes_csv(bundle, tmp_path, capsys):
    out = tmp_path / "f.csv"
    assert main(["forecast", str(bundle), "--state", "1,0", "--until", "3", "--every", "0.5",
                 "--out", str(out)]) == 0
    table = np.loadtxt(out, delimiter=",", skiprows=1)
    assert table.shape == (7, 3)
    # Reference: closed form of the oscillator, x = cos(2t).
    assert np.allclose(table[:, 1], np.cos(2 * table[:, 0]), atol=1e-5)


@pytest.mark.parametrize(("arguments", "message"), [
    (["--state", "1,0,0", "--time", "1"], "expected (2,) or (batch, 2)"),
    (["--state", "1,x", "--time", "1"], "not a comma-separated list"),
    (["--state", "1,0", "--time", "-1"], "expected a finite time"),
])
def test_advance_bad_input(bundle, capsys, arguments, message):
    assert main(["advance", str(bundle), *arguments]) == 1
    assert message in capsys.readouterr().err


def test_every_command_has_help_with_example():
    for command in ("inspect", "advance", "forecast"):
        result = subprocess.run([sys.executable, "-m", "stridecast", command, "--help"],
                                capture_output=True, text=True, check=True)
        assert "example:" in result.stdout


# ---------------------------------------------------------------------------- trust output
def trusted_bundle(tmp_path):
    """The oscillator with a validation curve (horizon 1.0) and its unit orbit as samples."""
    from stridecast.runtime import ValidationCurve

    ring = np.stack([np.cos(np.linspace(0, 2 * np.pi, 360, endpoint=False)),
                     2 * np.sin(np.linspace(0, 2 * np.pi, 360, endpoint=False))], axis=1)
    curve = ValidationCurve(metric="normalised_rms", tolerance=0.1, reference_std=(1.0, 2.0),
                            times=(0.5, 1.0, 1.5), errors=(0.02, 0.06, 0.3))
    return linear_bundle(tmp_path / "trusted.bundle", oscillator_matrix(), base_step=0.1,
                         strides=(1, 4, 16), envelope=([-1.2, -2.4], [1.2, 2.4]),
                         samples=ring, radius=0.3, validation=curve,
                         validated_horizon=1.0)


def test_advance_reports_expected_error_and_findings(tmp_path, capsys):
    from stridecast.runtime import load

    bundle = trusted_bundle(tmp_path)
    assert main(["advance", str(bundle), "--state", "1,0", "--time", "0.8", "--json"]) == 0
    captured = capsys.readouterr()
    answer = json.loads(captured.out)
    # Reference: numpy.interp on the curve with (0, 0) prepended.
    assert answer["expected_error"] == pytest.approx(np.interp(0.8, [0, 0.5, 1.0], [0, .02, .06]))
    assert answer["findings"] == [] and answer["warnings"] == []
    # Far from the data (the fixed point, 1 from the ring) and beyond the horizon: the CLI
    # prints the runtime's own words.
    assert main(["advance", str(bundle), "--state", "0,0", "--time", "1.2", "--json"]) == 0
    captured = capsys.readouterr()
    answer = json.loads(captured.out)
    kinds = [finding["kind"] for finding in answer["findings"]]
    assert kinds == ["far_from_data", "beyond_horizon"]
    _, plan = load(bundle, on_extrapolation="ignore").advance_with_plan(np.zeros(2), 1.2)
    assert answer["warnings"] == [finding.message for finding in plan.findings]
    for finding in plan.findings:
        assert f"warning: {finding.message}" in captured.err
    assert main(["advance", str(bundle), "--state", "1,0", "--time", "0.5"]) == 0
    assert "expected error 0.02 (held-out normalised RMS" in capsys.readouterr().out


def test_forecast_reports_expected_error_per_time(tmp_path, capsys):
    bundle = trusted_bundle(tmp_path)
    assert main(["forecast", str(bundle), "--state", "1,0", "--times", "0.5,2.0", "--json"]) == 0
    answer = json.loads(capsys.readouterr().out)
    assert answer["expected_error"] == [0.02, None]  # past the curve: unbounded → null
    assert [f["kind"] for f in answer["findings"]] == ["beyond_horizon"]
    assert answer["findings"][0]["message"].startswith("1 of 2 requested times (t = 2 s) is")
    assert main(["forecast", str(bundle), "--state", "1,0", "--times", "0.5,2.0"]) == 0
    captured = capsys.readouterr()
    assert "exp. error" in captured.out and "unbounded" in captured.out
    assert "warning: 1 of 2 requested times" in captured.err


def test_inspect_shows_validation_and_samples(tmp_path, capsys):
    bundle = trusted_bundle(tmp_path)
    assert main(["inspect", str(bundle)]) == 0
    text = capsys.readouterr().out
    assert "samples      360 training states (envelope/samples.npy); far from the data " \
           "beyond 0.3 (normalised units)" in text
    assert "validation  normalised_rms held-out error, tolerance 0.1; 3 curve points" in text
    assert "error 0.06" in text and "validated   1 s" in text
    assert main(["inspect", str(bundle), "--json"]) == 0
    manifest = json.loads(capsys.readouterr().out)["manifest"]
    assert manifest["validation"]["errors"] == [0.02, 0.06, 0.3]
    assert manifest["envelope"]["samples"]["count"] == 360


def test_advance_says_evaluation_in_the_singular_for_one(bundle, capsys):
    # t = 1.6 = one stride-16 step of 0.1: a single network evaluation.
    assert main(["advance", str(bundle), "--state", "1,0", "--time", "1.6"]) == 0
    out = capsys.readouterr().out
    assert "; 1 network evaluation)" in out


# ------------------------------------------------------------------------- field bundles
FIELD_DIM, FIELD_RATES = 300, (-0.05, -0.2, -0.5, -1.0)


@pytest.fixture
def field(tmp_path):
    return field_bundle(tmp_path / "field.bundle", dim=FIELD_DIM, rates=FIELD_RATES,
                        base_step=0.1, strides=(1, 8), mean=20.0, scale=2.0,
                        reconstruction=0.01)


def _field_reference(states: np.ndarray, t: float) -> np.ndarray:
    """The exact latent flow expm(diag(rates) t) (scipy.linalg.expm) on the sine basis."""
    basis = sine_basis(FIELD_DIM, len(FIELD_RATES))
    latent = ((np.atleast_2d(states) - 20.0) / 2.0) @ basis
    return (latent @ expm(np.diag(FIELD_RATES) * t).T) @ basis.T * 2.0 + 20.0


def _field_states(count: int) -> np.ndarray:
    basis = sine_basis(FIELD_DIM, len(FIELD_RATES))
    return 20.0 + 2.0 * np.random.default_rng(4).normal(size=(count, 4)) @ basis.T


def test_inspect_shows_the_reduction(field, capsys):
    assert main(["inspect", str(field)]) == 0
    text = capsys.readouterr().out
    assert "reduction   latent dimension 4; reconstruction check above 0.01" in text
    assert "encoder  linear, 1200 parameters  reduction/encoder.onnx" in text
    assert "decoder  linear" in text and "checksum ok" in text
    assert "u2 [K], … 294 more …, u297 [K]" in text
    assert main(["inspect", str(field), "--json"]) == 0
    reduction = json.loads(capsys.readouterr().out)["reduction"]
    assert reduction["latent_dim"] == 4 and reduction["reconstruction_threshold"] == 0.01
    assert reduction["encoder"]["form"] == reduction["decoder"]["form"] == "linear"


@pytest.mark.parametrize("kind", [".npy", ".csv", ".json"])
def test_advance_a_field_from_a_state_file_to_a_file(field, tmp_path, capsys, kind):
    states = _field_states(2)
    source = tmp_path / f"start{kind}"
    if kind == ".npy":
        np.save(source, states)
    elif kind == ".csv":
        np.savetxt(source, states, delimiter=",", fmt="%.17g")
    else:
        source.write_text(json.dumps(states.tolist()))
    out = tmp_path / "answer.npy"
    assert main(["advance", str(field), "--state-file", str(source), "--time", "1.7",
                 "--dtype", "float64", "--out", str(out)]) == 0
    text = capsys.readouterr().out
    assert f"wrote 2 states of {FIELD_DIM} components to {out}" in text
    answer = np.load(out)
    assert answer.shape == (2, FIELD_DIM)
    # Reference: scipy.linalg.expm of the latent system, decoded.
    np.testing.assert_allclose(answer, _field_reference(states, 1.7), rtol=0, atol=1e-12)


def test_a_wide_answer_is_summarised_without_out(field, tmp_path, capsys):
    source = tmp_path / "start.npy"
    np.save(source, _field_states(1)[0])
    assert main(["advance", str(field), "--state-file", str(source), "--time", "0.8",
                 "--dtype", "float64"]) == 0
    text = capsys.readouterr().out
    exact = _field_reference(np.load(source), 0.8)[0]
    assert (f"state: {FIELD_DIM} components, min {exact.min():.7g}, max {exact.max():.7g}, "
            f"RMS {np.sqrt(np.mean(exact**2)):.7g}") in text
    assert "use --out FILE (.csv or .npy) or --json" in text
    assert len(text.splitlines()) < 6
    assert main(["forecast", str(field), "--state-file", str(source), "--times", "0,0.8",
                 "--dtype", "float64"]) == 0
    text = capsys.readouterr().out
    assert f"min {exact.min():.7g}" in text and "are summarised" in text


def test_field_state_file_of_the_wrong_width_is_named(field, tmp_path, capsys):
    source = tmp_path / "start.npy"
    np.save(source, np.zeros((2, FIELD_DIM - 1)))
    assert main(["advance", str(field), "--state-file", str(source), "--time", "1"]) == 1
    error = capsys.readouterr().err
    assert f"shape (2, {FIELD_DIM - 1})" in error and f"(batch, {FIELD_DIM})" in error


def test_off_subspace_state_is_reported(field, tmp_path, capsys):
    state = _field_states(1)[0]
    state[7] += 5.0  # one spike: far from the four smooth modes
    source = tmp_path / "start.json"
    source.write_text(json.dumps(state.tolist()))
    assert main(["advance", str(field), "--state-file", str(source), "--time", "1",
                 "--json"]) == 0
    answer = json.loads(capsys.readouterr().out)
    [finding] = [f for f in answer["findings"] if f["kind"] == "off_subspace"]
    assert finding["components"][0] == "u7"
    assert any("reduced basis" in message for message in answer["warnings"])
