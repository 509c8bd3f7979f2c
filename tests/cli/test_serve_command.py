"""`stridecast serve` start-up: checks before the server starts, names, aliases, exit codes.

uvicorn.run is replaced by a recorder: these tests stop where the server would start.
"""

from __future__ import annotations

import shutil
import socket
import sys

import pytest

from stridecast import demo_bundle
from stridecast.cli import main
from stridecast.demo.settings import DEFAULT_OUT
from stridecast.runtime import load
from stridecast.runtime.bundle import model_name
from tests.builders import linear_bundle, oscillator_matrix
from tests.servers import free_port

server = pytest.importorskip("stridecast.service.server", reason="needs the service extra")


@pytest.fixture
def started(monkeypatch):
    calls = []
    monkeypatch.setattr(server.uvicorn, "run", lambda app, **options: calls.append(options))
    return calls


def _bundle(path):
    return linear_bundle(path, oscillator_matrix(), base_step=0.1, strides=(1, 4))


def test_start_up_names_the_models_and_shows_the_caution(tmp_path, started, capsys):
    bundle = _bundle(tmp_path / "osc.bundle")
    assert main(["serve", str(bundle), str(tmp_path / "missing.bundle"),
                 "--port", str(free_port())]) == 0
    err = capsys.readouterr().err
    assert "serving model 'osc' from" in err
    assert "not serving 'missing'" in err
    assert "not a safety function" in err
    assert len(started) == 1


def test_no_loadable_bundle_exits_with_the_reasons(tmp_path, started, capsys):
    (tmp_path / "empty").mkdir()
    assert main(["serve", str(tmp_path / "empty"), "--port", str(free_port())]) == 1
    err = capsys.readouterr().err
    assert "no bundle could be loaded, so there is nothing to serve" in err
    assert "manifest.json" in err
    assert "not a safety function" not in err
    assert started == []


def test_a_port_in_use_fails_before_the_app_starts(tmp_path, started, capsys):
    bundle = _bundle(tmp_path / "osc.bundle")
    with socket.socket() as taken:
        taken.bind(("127.0.0.1", 0))
        taken.listen()
        port = taken.getsockname()[1]
        assert main(["serve", str(bundle), "--port", str(port)]) == 1
    assert f"`port` {port} on 127.0.0.1 is already in use" in capsys.readouterr().err
    assert started == []


def test_two_bundles_with_one_name_are_refused_with_how_to_rename(tmp_path, started, capsys):
    first = _bundle(tmp_path / "a" / "crane-demo.bundle")
    second = _bundle(tmp_path / "b" / "crane-demo.bundle")
    assert main(["serve", str(first), str(second), "--port", str(free_port())]) == 1
    err = capsys.readouterr().err
    assert "two bundles would be served under one name: 'crane-demo'" in err
    assert "rename one folder" in err
    assert started == []


def test_the_demo_output_and_the_shipped_bundle_serve_together(tmp_path, started, capsys):
    # `stridecast demo` writes ./crane-demo.bundle; `serve crane-demo.bundle --demo` must not
    # clash with the shipped bundle, whose folder and manifest both say "crane-shipped".
    shipped = demo_bundle()
    assert model_name(shipped) == load(shipped).manifest.name == "crane-shipped"
    written = shutil.copytree(shipped, tmp_path / DEFAULT_OUT.name)
    assert main(["serve", str(written), "--demo", "--port", str(free_port())]) == 0
    err = capsys.readouterr().err
    assert "serving model 'crane-demo' from" in err
    assert "serving model 'crane-shipped' from" in err
    assert len(started) == 1


@pytest.mark.parametrize("flag", ["--compute-slots", "--limit-concurrency"])
def test_compute_slots_and_its_deprecated_alias(monkeypatch, tmp_path, flag, capsys):
    calls = []
    monkeypatch.setattr(server, "serve", lambda paths, **options: calls.append(options))
    assert main(["serve", str(tmp_path), flag, "3"]) == 0
    assert calls[0]["max_concurrency"] == 3
    deprecated = "`--limit-concurrency` is deprecated; write `--compute-slots`."
    assert (deprecated in capsys.readouterr().err) == (flag == "--limit-concurrency")


def test_a_missing_extra_names_the_install_command(monkeypatch, capsys):
    # None in sys.modules makes the import fail as if the service extra were not installed.
    monkeypatch.setitem(sys.modules, "stridecast.service.server", None)
    with pytest.raises(SystemExit) as stop:
        main(["serve", "--demo"])
    assert stop.value.code == 1
    assert 'pip install -e ".[service]"' in capsys.readouterr().err


def test_max_abs_value_and_max_coarse_steps_reach_the_settings(tmp_path, monkeypatch, capsys):
    apps = []
    monkeypatch.setattr(server.uvicorn, "run", lambda app, **options: apps.append(app))
    bundle = _bundle(tmp_path / "osc.bundle")
    assert main(["serve", str(bundle), "--port", str(free_port()), "--max-abs-value", "1e3",
                 "--max-coarse-steps", "500"]) == 0
    settings = apps[0].state.settings
    assert settings.max_abs_value == 1e3 and settings.max_coarse_steps == 500
    # Without the options, the settings' own defaults (no bound) stay.
    assert main(["serve", str(bundle), "--port", str(free_port())]) == 0
    assert apps[1].state.settings.max_abs_value is None
    assert apps[1].state.settings.max_coarse_steps is None


def test_the_new_limits_show_their_defaults_in_help(capsys):
    with pytest.raises(SystemExit):
        main(["serve", "--help"])
    text = " ".join(capsys.readouterr().out.split())
    assert "--max-abs-value X" in text and "default: none, i.e. whatever the model's" in text
    # The default stated in the help: a quarter of the runtime's per-query evaluation budget
    # (service/model_limits.max_time with coarse_steps None).
    from stridecast.runtime.limits import DEFAULT_LIMITS
    from stridecast.service.model_limits import COARSE_SHARE

    quarter = DEFAULT_LIMITS.max_steps_per_query // COARSE_SHARE
    assert "--max-coarse-steps N" in text and f"per-query budget: {quarter:,})" in text


@pytest.mark.parametrize(("argv", "message"), [
    (["--max-abs-value", "-1"], "`--max-abs-value` is -1.0; input should be greater than 0"),
    (["--max-abs-value", "inf"], "`--max-abs-value` is inf;"),
    (["--max-coarse-steps", "0"], "`--max-coarse-steps` is 0; input should be greater than or "
                                  "equal to 1"),
])
def test_a_bad_limit_is_a_usage_error_naming_the_option(tmp_path, started, capsys, argv,
                                                        message):
    # The bounds are the Settings' (pydantic), reported as the option the user wrote.
    bundle = _bundle(tmp_path / "osc.bundle")
    assert main(["serve", str(bundle), "--port", str(free_port()), *argv]) == 2
    assert message in capsys.readouterr().err
    assert started == []
