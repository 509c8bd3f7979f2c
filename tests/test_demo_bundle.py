"""`stridecast.demo_bundle()`: the one way to the shipped bundle, light to import."""

from __future__ import annotations

import json
import re
import subprocess
import sys
from pathlib import Path

import pytest

import stridecast
from stridecast.runtime import load

ROOT = Path(__file__).resolve().parent.parent


def test_demo_bundle_is_a_loadable_bundle():
    path = stridecast.demo_bundle()
    assert (path / "manifest.json").is_file()
    stepper = load(path)
    assert stepper.state_dim == 4


def test_demo_bundle_imports_nothing_heavy():
    code = ("import sys, json, stridecast\n"
            "stridecast.demo_bundle()\n"
            "print(json.dumps(sorted(m.split('.')[0] for m in sys.modules)))")
    output = subprocess.run([sys.executable, "-c", code], check=True, capture_output=True,
                            text=True).stdout
    loaded = set(json.loads(output))
    assert "numpy" not in loaded


def test_a_missing_bundle_is_named(monkeypatch, tmp_path):
    monkeypatch.setattr(stridecast, "_DEMO_BUNDLE", tmp_path / "absent.bundle")
    with pytest.raises(FileNotFoundError, match=r"shipped demo bundle is missing at .*absent"):
        stridecast.demo_bundle()
    assert stridecast.demo_bundle(must_exist=False) == tmp_path / "absent.bundle"


def test_the_shipped_path_is_spelled_in_one_place():
    # Every other module asks demo_bundle(); none builds the path to the package data itself.
    spelled = re.compile(r"""["']data["']\s*/\s*["']crane-shipped\.bundle"""
                         r"""|data/crane-shipped\.bundle""")
    places = [path.relative_to(ROOT).as_posix()
              for folder in ("stridecast", "runtime", "export", "service", "benchmarks", "tests")
              for path in (ROOT / folder).rglob("*.py")
              if spelled.search(path.read_text(encoding="utf-8"))]
    assert places == ["stridecast/__init__.py"]
