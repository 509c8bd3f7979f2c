"""`import stridecast` and `import stridecast.runtime` stay free of heavy dependencies.

Checked in a fresh interpreter, since this test process has imported them already.
"""

from __future__ import annotations

import json
import subprocess
import sys

import pytest

FORBIDDEN = ("torch", "onnx", "onnxruntime", "fastapi", "scipy", "starlette", "pydantic")


@pytest.mark.parametrize(
    "module", ["stridecast", "stridecast.runtime", "stridecast.cli", "stridecast.demo"])
def test_no_heavy_imports(module):
    code = (
        f"import sys, json, {module}\n"
        "print(json.dumps(sorted(m.split('.')[0] for m in sys.modules)))"
    )
    output = subprocess.run([sys.executable, "-c", code], check=True, capture_output=True,
                            text=True).stdout
    loaded = set(json.loads(output))
    assert not loaded & set(FORBIDDEN), sorted(loaded & set(FORBIDDEN))
