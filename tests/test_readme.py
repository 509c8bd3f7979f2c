"""Every command and code block in README.md runs as printed.

The set-up commands at the top are not re-run here: the test command is what `.ci/run`
executes, and `stridecast demo` is exercised end to end by tests/cli/test_demo.py (`--quick`,
the same code path at smaller size). Commands that use `crane-demo.bundle` run against a copy
of the bundle shipped in the package, which the demo's own code made.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import socket
import subprocess
import sys
import time
from pathlib import Path

import pytest

import stridecast

ROOT = Path(__file__).resolve().parent.parent
README = (ROOT / "README.md").read_text(encoding="utf-8")
SHIPPED = stridecast.demo_bundle()
BLOCK = re.compile(r"```(python|bash)\n(.*?)```", re.DOTALL)
# Lines of the two set-up commands (covered by .ci/run and tests/cli/test_demo.py).
SETUP = ("python3 -m venv",)


def blocks() -> list[tuple[str, str]]:
    return [(kind, body) for kind, body in BLOCK.findall(README)]


def shell_lines(body: str) -> list[str]:
    return [line.strip() for line in body.splitlines()
            if line.strip() and not line.strip().startswith("#")]


@pytest.fixture
def workdir(tmp_path, monkeypatch):
    shutil.copytree(SHIPPED, tmp_path / "crane-demo.bundle")
    monkeypatch.chdir(tmp_path)
    # The CLI remembers where it showed the caution; keep that marker out of the user's cache.
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "cache"))
    return tmp_path


def run_shell(line: str, cwd: Path) -> subprocess.CompletedProcess:
    environment = dict(os.environ)
    environment["PATH"] = f"{Path(sys.executable).parent}{os.pathsep}{environment['PATH']}"
    return subprocess.run(line, shell=True, cwd=cwd, capture_output=True, text=True,
                          timeout=600, env=environment)


@pytest.mark.slow
def test_readme_blocks_run_in_order(workdir):
    ran = 0
    for kind, body in blocks():
        if kind == "python":
            exec(compile(body, "README.md", "exec"), {"__name__": "readme"})
            ran += 1
            continue
        for line in shell_lines(body):
            if line.startswith(SETUP) or line.startswith(("stridecast serve", "curl ")):
                continue
            result = run_shell(line, workdir)
            assert result.returncode == 0, f"{line}\n{result.stdout}\n{result.stderr}"
            ran += 1
    assert ran >= 8
    assert (workdir / "forecast.csv").is_file()
    assert (workdir / "my-model.bundle" / "manifest.json").is_file()
    assert (workdir / "crane-trained.bundle" / "manifest.json").is_file()


def free_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


def test_readme_serve_and_curl(workdir):
    http = next(body for kind, body in blocks()
                if kind == "bash" and "stridecast serve" in body and "curl" in body)
    serve_line, curl_line = shell_lines(http)
    port = str(free_port())
    serve_line, curl_line = serve_line.replace("8000", port), curl_line.replace("8000", port)
    environment = dict(os.environ)
    environment["PATH"] = f"{Path(sys.executable).parent}{os.pathsep}{environment['PATH']}"
    server = subprocess.Popen(serve_line, shell=True, cwd=workdir, env=environment,
                              stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                              start_new_session=True)
    try:
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline:
            probe = run_shell(f"curl -sf http://127.0.0.1:{port}/readyz", workdir)
            if probe.returncode == 0:
                break
            time.sleep(0.3)
        result = run_shell(curl_line, workdir)
        assert result.returncode == 0, result.stderr
        answer = json.loads(result.stdout)
        assert len(answer["state"]) == 4 and answer["t"] == 12.5
    finally:
        os.killpg(server.pid, 15)
        server.wait(timeout=30)


def _setup_commands() -> list[str]:
    return [line for kind, body in blocks() if kind == "bash"
            for line in shell_lines(body) if line.startswith(SETUP)]


def test_ci_runs_the_readme_test_command_verbatim():
    # The README promises its test command is what CI runs; .ci/run must contain it as is.
    test_command = next(line for line in _setup_commands() if "pytest" in line)
    ci = (ROOT / ".ci" / "run").read_text(encoding="utf-8")
    assert test_command in ci.splitlines(), "README test command not found verbatim in .ci/run"


def test_the_setup_commands_use_separate_ignored_environments():
    # Two commands sharing one venv would silently reuse the first one's packages.
    folders = [re.search(r"python3 -m venv (\S+)", line).group(1) for line in _setup_commands()]
    assert len(folders) == 2 and len(set(folders)) == 2, folders
    ignored = (ROOT / ".gitignore").read_text(encoding="utf-8").splitlines()
    for folder in folders:
        assert f"{folder}/" in ignored or (".venv-*/" in ignored and folder.startswith(".venv-"))


@pytest.mark.parametrize("document", ["README.md", "DEVELOPERS.md", "docs/demo.md"])
def test_install_commands_work_from_the_repository(document):
    # stridecast is on no package index: `pip install stridecast[...]` would fail (or fetch a
    # stranger's package). Every pip command installs the clone (-e .) or a named tool.
    text = (ROOT / document).read_text(encoding="utf-8")
    for match in re.finditer(r"pip install ([^\n`]*)", text):
        arguments = match.group(1)
        if "stridecast" in arguments or ".[" in arguments:
            assert re.search(r"-e \"?\.(\[|\"| |$)", arguments), match.group(0)
