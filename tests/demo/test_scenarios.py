"""The demo's scenario table and `--scenario` (stridecast demo, python -m stridecast.demo)."""

from __future__ import annotations

import argparse
import subprocess
import sys

import pytest

from stridecast.cli import main as cli_main
from stridecast.demo import run, scenarios
from stridecast.demo.options import add_arguments
from stridecast.runtime import OptionError


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="demo")
    add_arguments(parser)
    return parser


def test_the_table_names_both_scenarios_with_their_own_folders():
    assert scenarios.names() == ("crane", "mooring")
    assert scenarios.DEFAULT_SCENARIO == "crane"
    folders = {scenario.default_out for scenario in scenarios.SCENARIOS}
    assert len(folders) == len(scenarios.SCENARIOS)  # no scenario overwrites another's bundle
    for scenario in scenarios.SCENARIOS:
        assert callable(scenario.load_runner())


def test_help_lists_every_scenario(capsys):
    with pytest.raises(SystemExit):
        cli_main(["demo", "--help"])
    text = capsys.readouterr().out
    for name in scenarios.names():
        assert name in text


def test_an_unknown_scenario_is_a_usage_error_listing_the_names(capsys):
    with pytest.raises(SystemExit) as stopped:
        _parser().parse_args(["--scenario", "harbour"])
    assert stopped.value.code == 2
    assert ("argument --scenario: unknown scenario 'harbour'; choose one of: crane, mooring."
            in capsys.readouterr().err)


def test_the_cli_and_the_module_refuse_an_unknown_scenario_alike():
    for command in (["-m", "stridecast", "demo"], ["-m", "stridecast.demo"]):
        finished = subprocess.run([sys.executable, *command, "--scenario", "pipeline"],
                                  capture_output=True, text=True)
        assert finished.returncode == 2
        assert "unknown scenario 'pipeline'; choose one of: crane, mooring." in finished.stderr


def test_get_scenario_raises_an_option_error_in_python():
    with pytest.raises(OptionError, match=r"`scenario` is 'x'; expected one of: crane, "
                                          r"mooring\."):
        scenarios.get_scenario("x")


def test_ship_is_refused_for_a_scenario_without_a_shipped_bundle(capsys):
    with pytest.raises(SystemExit) as stopped:
        run.module_main(["--ship", "--scenario", "mooring"])
    assert stopped.value.code == 2
    assert "only the crane scenario has; drop --ship." in capsys.readouterr().err


def test_the_default_out_follows_the_scenario(monkeypatch, tmp_path):
    seen = {}

    def runner(arguments: argparse.Namespace) -> int:
        seen["out"] = arguments.out
        return 0

    fake = scenarios.Scenario("mooring", "", tmp_path / "m.bundle", "unused:unused")
    monkeypatch.setattr(scenarios.Scenario, "load_runner", lambda self: runner)
    monkeypatch.setattr(scenarios, "SCENARIOS", (fake,))
    assert scenarios.main(argparse.Namespace(scenario="mooring", out=None)) == 0
    assert seen["out"] == tmp_path / "m.bundle"
    scenarios.main(argparse.Namespace(scenario="mooring", out=tmp_path / "mine.bundle"))
    assert seen["out"] == tmp_path / "mine.bundle"  # an explicit --out wins
