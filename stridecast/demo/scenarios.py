"""The demo's scenarios, as data: name, one-line summary, default bundle folder, runner.

`stridecast demo --scenario NAME` looks the name up here; adding a scenario means adding a row
and its runner module, nothing else. Light on purpose: the CLI's parser reads this table.
"""

from __future__ import annotations

import argparse
import importlib
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

from stridecast.runtime import OptionError


@dataclass(frozen=True)
class Scenario:
    """One invented scenario of the demo.

    Attributes
    ----------
    name : str
        What `--scenario` takes.
    summary : str
        One line for `--help`.
    default_out : Path
        The bundle folder written when `--out` is not given.
    runner : str
        "module:function"; the function takes the parsed options and returns an exit status.
        Imported only when the scenario runs (it pulls torch, SciPy, matplotlib).
    ships : bool
        Whether `python -m stridecast.demo --ship` can regenerate a bundle shipped in the package.
    """

    name: str
    summary: str
    default_out: Path
    runner: str
    ships: bool = False

    def load_runner(self) -> Callable[[argparse.Namespace], int]:
        module, function = self.runner.split(":")
        return getattr(importlib.import_module(module), function)


SCENARIOS: tuple[Scenario, ...] = (
    Scenario("crane", "a crane's load bobbing on its cable (0.4 s) while it swings (9.9 s); "
             "state of 4", Path("crane-demo.bundle"), "stridecast.demo.run:crane_main",
             ships=True),
    Scenario("mooring", "a taut mooring line vibrating (0.57 s) while the boat at its end "
             "sways (20 s); a field of 256, reduced by POD", Path("mooring-demo.bundle"),
             "stridecast.demo.field_run:main"),
)
DEFAULT_SCENARIO = "crane"


def names() -> tuple[str, ...]:
    return tuple(scenario.name for scenario in SCENARIOS)


def get_scenario(name: str) -> Scenario:
    """The scenario called `name`; `OptionError` naming the known ones otherwise."""
    for scenario in SCENARIOS:
        if scenario.name == name:
            return scenario
    raise OptionError(f"`scenario` is {name!r}; expected one of: {', '.join(names())}.")


def scenario_option(text: str) -> str:
    """argparse `type=` for `--scenario`: the name, or a usage error listing the names."""
    try:
        return get_scenario(text).name
    except OptionError as error:
        raise argparse.ArgumentTypeError(
            f"unknown scenario {text!r}; choose one of: {', '.join(names())}.") from error


def help_text() -> str:
    rows = "; ".join(f"{scenario.name}: {scenario.summary}" for scenario in SCENARIOS)
    return f"which invented scenario to run — {rows} (default: {DEFAULT_SCENARIO})"


def main(arguments: argparse.Namespace) -> int:
    """Run the scenario `arguments.scenario` names; return the exit status."""
    scenario = get_scenario(getattr(arguments, "scenario", DEFAULT_SCENARIO))
    if arguments.out is None:
        arguments = argparse.Namespace(**{**vars(arguments), "out": scenario.default_out})
    return scenario.load_runner()(arguments)
