"""`stridecast serve` start-up: checks before the server starts, names, aliases, exit codes.

uvicorn.run is replaced by a recorder: these tests stop where the server would start.
"""

from __future__ import annotations

import socket
import sys

import pytest

from stridecast.cli import main
from tests.builders import linear_bundle, oscillator_matrix

server = pytest.importorskip("stridecast.service.server", reason="needs the service extra")


@pytest.fixture
def started(monkeypatch):
    calls = []
    monkeypatch.setattr(server.uvicorn, "run", lambda app, **options: calls.append(options))
    return calls


def _bundle(path):
    return linear_bundle(path, oscillator_matrix(), base_step=0.1, strides=(1, 4))


def _free_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


def test_start_up_names_the_models_and_shows_the_caution(tmp_path, started, capsys):
    bundle = _bundle(tmp_path / "osc.bundle")
    assert main(["serve", str(bundle), str(tmp_path / "missing.bundle"),
                 "--port", str(_free_port())]) == 0
    err = capsys.readouterr().err
    assert "serving model 'osc' from" in err
    assert "not serving 'missing'" in err
    assert "not a safety function" in err
    assert len(started) == 1


def test_no_loadable_bundle_exits_with_the_reasons(tmp_path, started, capsys):
    (tmp_path / "empty").mkdir()
    assert main(["serve", str(tmp_path / "empty"), "--port", str(_free_port())]) == 1
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
    assert main(["serve", str(first), str(second), "--port", str(_free_port())]) == 1
    err = capsys.readouterr().err
    assert "two bundles would be served under one name: 'crane-demo'" in err
    assert "rename one folder" in err
    assert started == []


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
