"""Start-up cost and memory, each measured in fresh Python processes.

Import times are taken inside the child around the import statement alone (interpreter start-up
excluded, so the comparison with `import numpy` is strict); the child's whole wall time is kept
too. Peak memory is the child's own high-water RSS (VmHWM) at exit. Children run in an empty
temporary directory so nothing in the current directory shadows an installed package.

Bytecode: an installed package ships (or compiles on first import) its .pyc files, but a source
checkout run with PYTHONDONTWRITEBYTECODE=1 would recompile the runtime on every import and
make it look several times slower than it is. Children therefore write and read bytecode in a
private cache (PYTHONPYCACHEPREFIX in a temporary directory; the source tree is not touched),
and every child program runs once untimed first to fill it.
"""

from __future__ import annotations

import json
import logging
import os
import subprocess
import sys
import tempfile
import time
from collections.abc import Mapping
from typing import Any

import numpy as np

logger = logging.getLogger("benchmarks")

# VmHWM, not ru_maxrss: Linux carries ru_maxrss over from the parent across fork and exec, so a
# child of a big benchmark process would report the parent's peak.
_REPORT = (
    "import json, sys\n"
    "_peak = next(int(line.split()[1]) for line in open('/proc/self/status')\n"
    "             if line.startswith('VmHWM:'))\n"
    "json.dump({'seconds': _elapsed, 'maxrss_kib': _peak}, sys.stdout)\n"
)
_TIMED_IMPORT = "import time\n_start = time.perf_counter()\n{body}\n" \
                "_elapsed = time.perf_counter() - _start\n"


def _script(body: str) -> str:
    return _TIMED_IMPORT.format(body=body) + _REPORT


def import_scripts() -> dict[str, str]:
    """Child programs timing one import each."""
    return {name: _script(f"import {name}") for name in
            ("numpy", "stridecast.runtime", "onnxruntime", "torch")}


def load_script(bundle: str) -> str:
    """Child program timing `import stridecast.runtime` plus loading `bundle`."""
    return _script(f"import stridecast.runtime\nstridecast.runtime.load({bundle!r})")


def memory_scripts(bundle: str) -> dict[str, str]:
    """Child programs whose peak RSS is compared: numpy alone and each way to run the bundle."""
    stridecast_body = (
        "import numpy as np\nfrom stridecast.runtime import load\n"
        f"stepper = load({bundle!r})\n"
        "state = np.asarray(stepper.manifest.mean, dtype=np.float32)\n"
        "for _ in range(20):\n"
        "    stepper.advance(state, 1000 * stepper.base_step)\n"
    )
    onnxruntime_body = (
        "import numpy as np, onnxruntime\nfrom stridecast.runtime import read_manifest\n"
        "from pathlib import Path\n"
        f"root = Path({bundle!r})\nmanifest = read_manifest(root)\n"
        "options = onnxruntime.SessionOptions()\noptions.intra_op_num_threads = 1\n"
        "options.inter_op_num_threads = 1\n"
        "options.add_session_config_entry('session.intra_op.allow_spinning', '0')\n"
        "sessions = [onnxruntime.InferenceSession(str(root / e.file), options,\n"
        "            providers=['CPUExecutionProvider']) for e in manifest.levels]\n"
        "state = np.zeros((1, manifest.state_dim), dtype=np.float32)\n"
        "for session, entry in zip(sessions, manifest.levels):\n"
        "    session.run([entry.output], {entry.input: state})\n"
    )
    return {
        "numpy": _script("import numpy"),
        "stridecast": _script(stridecast_body),
        "onnxruntime": _script(onnxruntime_body),
        "torch (import only)": _script("import torch"),
    }


def child_environment(pycache: str) -> dict[str, str]:
    """This process's environment with bytecode caching on, into the private `pycache`."""
    env = {name: value for name, value in os.environ.items()
           if name != "PYTHONDONTWRITEBYTECODE"}
    env["PYTHONPYCACHEPREFIX"] = pycache
    return env


def _run_child(script: str, directory: str, env: Mapping[str, str] | None = None
               ) -> dict[str, float]:
    begin = time.perf_counter()
    completed = subprocess.run([sys.executable, "-c", script], cwd=directory, check=False,
                               capture_output=True, text=True,
                               env=dict(os.environ if env is None else env))
    wall = time.perf_counter() - begin
    if completed.returncode != 0:
        raise RuntimeError(f"benchmark child failed ({completed.returncode}): "
                           f"{completed.stderr.strip()[-500:]}")
    record = json.loads(completed.stdout)
    record["wall"] = wall
    return record


def _repeat(scripts: Mapping[str, str], repeats: Mapping[str, int], directory: str,
            env: Mapping[str, str]) -> dict[str, list[dict[str, float]]]:
    """Run each child once untimed, then round-robin (so background load touches all alike)."""
    runs: dict[str, list[dict[str, float]]] = {name: [] for name in scripts}
    failed: set[str] = set()
    for name, script in scripts.items():
        try:
            _run_child(script, directory, env)  # fills the bytecode cache
        except RuntimeError as error:
            logger.info("%s left out: %s", name, error)
            failed.add(name)
    for round_index in range(max(repeats.values())):
        for name, script in scripts.items():
            if round_index < repeats[name] and name not in failed:
                runs[name].append(_run_child(script, directory, env))
    return runs


def _median(values: list[float]) -> float | None:
    return float(np.median(values)) if values else None


def run(bundle: os.PathLike[str] | str, *, quick: bool = False) -> dict[str, Any]:
    """Import times, import + load time and peak RSS, medians over fresh processes.

    Returns
    -------
    dict
        `imports` {name: {seconds, wall, repeats}}, `import_and_load` {seconds, wall},
        `peak_rss_kib` {name: KiB}.
    """
    bundle = os.fspath(os.path.abspath(bundle))
    with tempfile.TemporaryDirectory(prefix="stridecast-bench-") as directory:
        env = child_environment(os.path.join(directory, "pycache"))
        scripts = import_scripts()
        memory_programs = memory_scripts(bundle)
        if quick:  # torch takes seconds to import (and far longer to compile the first time)
            del scripts["torch"], memory_programs["torch (import only)"]
        scripts["import_and_load"] = load_script(bundle)
        repeats = {name: 5 if name == "torch" else (5 if quick else 15) for name in scripts}
        runs = _repeat(scripts, repeats, directory, env)
        memory = _repeat(memory_programs, dict.fromkeys(memory_programs, 1 if quick else 3),
                         directory, env)
    imports = {}
    baseline = [r["seconds"] for r in runs.get("numpy", [])]
    for name, records in runs.items():
        seconds = [r["seconds"] for r in records]
        # Children of one round ran back to back, so their ratio cancels most of the load
        # from elsewhere on the machine; the median of these ratios is what targets use.
        ratios = [own / base for own, base in zip(seconds, baseline, strict=False) if base]
        imports[name] = {"seconds": _median(seconds),
                         "wall": _median([r["wall"] for r in records]),
                         "ratio_to_numpy": _median(ratios),
                         "repeats": len(records)}
    load = imports.pop("import_and_load")
    rss = {name: _median([r["maxrss_kib"] for r in records]) for name, records in memory.items()}
    logger.info("imports: %s", {name: value["seconds"] for name, value in imports.items()})
    logger.info("peak RSS (KiB): %s", rss)
    return {"imports": imports, "import_and_load": load, "peak_rss_kib": rss,
            "bytecode": "cached in a private PYTHONPYCACHEPREFIX, filled by one untimed run"}
