"""`stridecast demo` and the crane bundle shipped in the package.

Expected states come from SciPy (solve_ivp, DOP853) through `stridecast.demo.crane.simulate`.
"""

from __future__ import annotations

import io
import json
import subprocess
import sys

import numpy as np
import pytest

from stridecast.cli import main as cli_main
from stridecast.demo import common, crane
from stridecast.demo import run as demo
from stridecast.demo.evaluation import ground_truth, held_out_states, position_errors
from stridecast.demo.settings import BASE_STEP, SHIPPED_BUNDLE, STRIDES, TABLE_HORIZONS
from stridecast.runtime import BundleError, StridecastError, load

HEAVY = ("torch", "onnx", "onnxruntime", "scipy", "matplotlib", "fastapi")
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # the PNG specification's file signature


def _report(bundle) -> dict:
    return json.loads((bundle / "report.json").read_text(encoding="utf-8"))


def test_an_existing_folder_is_refused_before_any_work(tmp_path):
    out = tmp_path / "crane-demo.bundle"
    out.mkdir()
    stream = io.StringIO()
    with pytest.raises(BundleError, match=r"`--out` '.*crane-demo.bundle' already exists; "
                                          r"pass --overwrite to replace it"):
        demo.run_demo(out, quick=True, progress=False, stream=stream)
    assert stream.getvalue() == ""


def test_a_missing_dependency_is_named_with_the_extras_to_install(monkeypatch, tmp_path):
    real = common.importlib.util.find_spec
    monkeypatch.setattr(common.importlib.util, "find_spec",
                        lambda name: None if name == "matplotlib" else real(name))
    with pytest.raises(StridecastError, match=r"the demo needs matplotlib, .*"
                                              r"stridecast\[export,demo\]"):
        demo.run_demo(tmp_path / "out.bundle", quick=True, progress=False,
                      stream=io.StringIO())


def test_ship_refuses_the_quick_settings(capsys):
    with pytest.raises(SystemExit) as stopped:
        demo.module_main(["--ship", "--quick"])
    assert stopped.value.code == 2
    assert "--ship uses the full settings; drop --quick." in capsys.readouterr().err


def test_importing_the_demo_loads_no_heavy_module():
    # `stridecast --help` builds the demo's parser; torch and friends load only when it runs.
    code = ("import json, sys, stridecast.demo.run, stridecast.cli\n"
            "print(json.dumps(sorted({m.split('.')[0] for m in sys.modules})))")
    output = subprocess.run([sys.executable, "-c", code], check=True, capture_output=True,
                            text=True).stdout
    assert not set(json.loads(output)) & set(HEAVY)


# ---------------------------------------------------------------------- the shipped bundle
def test_shipped_bundle_verifies_and_is_small():
    stepper = load(SHIPPED_BUNDLE, verify=True)
    assert stepper.strides == STRIDES
    assert stepper.state_names == crane.STATE_NAMES
    assert stepper.base_step == BASE_STEP
    size = sum(path.stat().st_size for path in SHIPPED_BUNDLE.rglob("*") if path.is_file())
    assert size < 400_000, f"the shipped bundle has grown to {size} bytes"


def test_shipped_bundle_still_matches_ground_truth_within_its_stated_tolerance():
    # Reference: SciPy solve_ivp DOP853 (crane.simulate), at the tolerances report.json names.
    check = _report(SHIPPED_BUNDLE)["demo"]["check"]
    # Some check states graze the min/max box mid-path; the error is measured regardless.
    stepper = load(SHIPPED_BUNDLE, on_extrapolation="ignore")
    states = np.asarray(check["states"])
    truth = crane.simulate(states, check["horizons"], rtol=check["ground_truth"]["rtol"],
                           atol=check["ground_truth"]["atol"])
    for horizon, expected, tolerance in zip(check["horizons"], truth,
                                            check["position_tolerance_m"], strict=True):
        error = position_errors(stepper.advance(states, horizon), expected).max()
        assert error <= tolerance, f"t = {horizon} s: {error:.4g} m > {tolerance} m"


def test_shipped_bundle_beats_the_finest_level_rollout_at_a_minute():
    # The point of the method: a few coarse steps drift less than 1,490 fine ones.
    stepper = load(SHIPPED_BUNDLE)
    states = held_out_states(8)
    horizon = TABLE_HORIZONS[-1]
    truth = ground_truth(states, [horizon])[0]
    rollout = states
    for _ in range(round(horizon / BASE_STEP)):
        rollout = stepper.step(rollout, 1)
    hierarchical = position_errors(stepper.advance(states, horizon), truth)
    finest = position_errors(rollout, truth)
    assert np.sqrt(np.mean(hierarchical**2)) < np.sqrt(np.mean(finest**2))


def test_shipped_bundle_runs_without_torch_or_scipy():
    # The runtime-only install: load, advance, and hybrid stepping on crane.vector_field.
    code = (
        "import json, sys\n"
        "from stridecast.demo import crane\n"
        "from stridecast.runtime import load\n"
        f"stepper = load({str(SHIPPED_BUNDLE)!r})\n"
        "state = [3.6178, -23.9374, 0.0, 0.0]\n"
        "plain = stepper.advance(state, 33.8)\n"
        "mixed = stepper.advance(state, 33.8, vector_field=crane.vector_field, "
        "hybrid_below=25)\n"
        "print(json.dumps({'plain': plain.tolist(), 'mixed': mixed.tolist(),\n"
        "                  'modules': sorted({m.split('.')[0] for m in sys.modules})}))\n"
    )
    output = subprocess.run([sys.executable, "-c", code], check=True, capture_output=True,
                            text=True).stdout
    answer = json.loads(output)
    assert not set(answer["modules"]) & set(HEAVY)
    assert np.all(np.isfinite(answer["plain"])) and np.all(np.isfinite(answer["mixed"]))


# ------------------------------------------------------------------------------ end to end
@pytest.mark.slow
def test_quick_demo_end_to_end(tmp_path, capsys):
    # `stridecast demo --quick`, as a user types it.
    out = tmp_path / "crane-demo.bundle"
    plots = tmp_path / "plots"
    assert cli_main(["demo", "--out", str(out), "--quick", "--no-progress",
                     "--plots-dir", str(plots)]) == 0
    text = capsys.readouterr().out

    stepper = load(out)
    assert stepper.strides == STRIDES
    for name in ("forecast.png", "error.png"):
        assert (plots / name).read_bytes()[:8] == PNG_SIGNATURE
        assert str(plots / name) in text
    assert "QUICK MODE" in text and "not a safety function" in text
    assert "curl -s -X POST http://127.0.0.1:8000/v1/models/crane-demo/advance" in text
    assert f"stridecast serve {out}" in text and f"stridecast advance {out}" in text
    figures = _report(out)["demo"]
    assert figures["mode"] == "quick"
    rows = figures["table"]
    assert [row["horizon"] for row in rows] == list(TABLE_HORIZONS)
    # The hierarchical plan needs far fewer network evaluations than the finest rollout.
    assert all(row["evaluations"] <= 10 < row["finest_evaluations"] for row in rows[1:])
    assert all(row["vector_field_evaluations"] > 0 for row in figures["hybrid"])
    assert len(figures["check"]["position_tolerance_m"]) == len(TABLE_HORIZONS)
