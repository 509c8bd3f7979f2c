"""`stridecast.caution`: its cache folder and session marker, and when the command line shows
the caution: once per session for `advance`/`forecast`, always on `inspect` start-up and on
demand, never with `--json` nor on errors; one text, quoted by the README."""

from __future__ import annotations

import os
import re
from pathlib import Path

import pytest

from stridecast import caution
from stridecast.cli import main
from tests import builders
from tests.builders import linear_bundle, oscillator_matrix

ROOT = Path(__file__).resolve().parents[1]
PHRASE = "not a safety function"
# The session marker in a temporary cache folder, for every test here (an autouse fixture).
private_cache = builders.private_cache


@pytest.fixture
def bundle(tmp_path):
    return linear_bundle(tmp_path / "osc.bundle", oscillator_matrix(), base_step=0.1,
                         strides=(1, 4))


def test_advance_shows_the_caution_once_per_session(bundle, capsys, private_cache):
    arguments = ["advance", str(bundle), "--state", "1,0", "--time", "0.4"]
    assert main(arguments) == 0
    assert PHRASE in capsys.readouterr().err
    assert (private_cache / "stridecast" / caution.MARKER_NAME).is_file()
    assert main(arguments) == 0
    assert PHRASE not in capsys.readouterr().err
    assert main([*arguments, "--caution"]) == 0
    assert PHRASE in capsys.readouterr().err


def test_the_session_ends_after_its_length(bundle, capsys, private_cache):
    arguments = ["forecast", str(bundle), "--state", "1,0", "--times", "0.1,0.4"]
    assert main(arguments) == 0
    capsys.readouterr()
    marker = private_cache / "stridecast" / caution.MARKER_NAME
    old = marker.stat().st_mtime - caution.SESSION_SECONDS - 60
    os.utime(marker, (old, old))
    assert main(arguments) == 0
    assert PHRASE in capsys.readouterr().err


def test_never_with_json_nor_on_errors(bundle, capsys):
    assert main(["advance", str(bundle), "--state", "1,0", "--time", "0.4", "--json"]) == 0
    assert PHRASE not in capsys.readouterr().err
    assert main(["advance", str(bundle), "--state", "1,0,0", "--time", "0.4"]) == 1
    err = capsys.readouterr().err
    assert "error" in err and PHRASE not in err
    assert main(["inspect", str(bundle), "--json"]) == 0
    assert PHRASE not in capsys.readouterr().err


def test_inspect_always_shows_it_and_caution_prints_it_on_demand(bundle, capsys):
    for _ in range(2):
        assert main(["inspect", str(bundle)]) == 0
        assert PHRASE in capsys.readouterr().err
    with pytest.raises(SystemExit) as stop:
        main(["--caution"])
    assert stop.value.code == 0
    assert capsys.readouterr().out.strip() == caution.CAUTION


def test_an_unwritable_cache_shows_the_caution_every_time(bundle, capsys, monkeypatch,
                                                           tmp_path):
    blocker = tmp_path / "not-a-folder"
    blocker.write_text("a file where the cache folder would go")
    monkeypatch.setenv("XDG_CACHE_HOME", str(blocker))
    for _ in range(2):
        assert main(["advance", str(bundle), "--state", "1,0", "--time", "0.4"]) == 0
        assert PHRASE in capsys.readouterr().err


def test_the_readme_quotes_the_one_caution_text():
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    quote = re.search(r"^> \*\*Caution\.\*\* (.*?)\n\n", readme, re.S | re.M).group(1)
    text = " ".join(line.removeprefix("> ").strip() for line in quote.splitlines())
    assert "Caution: " + text[0].lower() + text[1:] == caution.CAUTION


# The cache folder follows the XDG Base Directory Specification (freedesktop.org, version 0.8):
# "$XDG_CACHE_HOME defines the base directory relative to which user-specific non-essential
# data files should be stored. If $XDG_CACHE_HOME is either not set or empty, a default equal
# to $HOME/.cache should be used."
def test_cache_folder_follows_xdg_cache_home(monkeypatch, tmp_path):
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "xdg"))
    assert caution.cache_folder() == tmp_path / "xdg" / "stridecast"


@pytest.mark.parametrize("unset", [True, False])
def test_cache_folder_defaults_to_home_cache_when_unset_or_empty(monkeypatch, tmp_path, unset):
    if unset:
        monkeypatch.delenv("XDG_CACHE_HOME", raising=False)
    else:
        monkeypatch.setenv("XDG_CACHE_HOME", "")
    monkeypatch.setenv("HOME", str(tmp_path / "home"))
    assert caution.cache_folder() == tmp_path / "home" / ".cache" / "stridecast"


def test_due_until_shown_then_again_after_the_session_length(private_cache):
    assert caution.due()
    caution.remember_shown()
    marker = private_cache / "stridecast" / caution.MARKER_NAME
    shown = marker.stat().st_mtime
    assert not caution.due(now=shown + 1)
    assert not caution.due(now=shown + caution.SESSION_SECONDS - 1)
    assert caution.due(now=shown + caution.SESSION_SECONDS + 1)


def test_remember_shown_on_an_unwritable_cache_is_silent_and_stays_due(monkeypatch, tmp_path):
    blocker = tmp_path / "a-file"
    blocker.write_text("where the cache folder would go")
    monkeypatch.setenv("XDG_CACHE_HOME", str(blocker))
    caution.remember_shown()
    assert caution.due()
