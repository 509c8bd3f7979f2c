"""`export/plots.py`: the PNG figures beside report.json.

References: the PNG specification (W3C, Portable Network Graphics, 2nd ed., §5.2 signature
89 50 4E 47 0D 0A 1A 0A; §11.2.2 IHDR: width and height as 4-byte big-endian integers right
after the chunk type) read by hand and by Pillow; matplotlib's own documented behaviour: a
figure saved without `bbox_inches` is figsize × dpi pixels.
"""

from __future__ import annotations

import struct
import sys

import numpy as np
import pytest
from matplotlib.figure import Figure
from PIL import Image

from stridecast.export import plots
from stridecast.export.plots import ERROR_PNG, FORECAST_COMPONENTS, FORECAST_PNG, write_plots
from stridecast.export.trained import ForecastExample

SIGNATURE = b"\x89PNG\r\n\x1a\n"


def _example(dim: int) -> ForecastExample:
    times = np.linspace(0.0, 2.0, 21)
    truth = np.sin(times[:, None] + np.arange(dim)[None, :])
    return ForecastExample(times=times, truth=truth, hierarchical=truth * 1.01,
                           finest_only=truth * 1.1)


VALIDATION = {
    "tolerance": 0.05, "validated_horizon": 1.2,
    "horizons": [{"time": t, "hierarchical_rmse": 0.01 * t, "finest_only_rmse": 0.03 * t}
                 for t in (0.1, 0.4, 1.6)],
    "curve": {"times": [0.1, 0.2, 0.3], "errors": [0.01, None, 0.02]},
}


def _png_size(data: bytes) -> tuple[int, int]:
    assert data[:8] == SIGNATURE and data[12:16] == b"IHDR"
    return struct.unpack(">II", data[16:24])


@pytest.fixture
def figures(monkeypatch):
    """Every Figure the module builds, kept for inspection (matplotlib's own class)."""
    made: list[Figure] = []

    class Kept(Figure):
        def __init__(self, *args, **kwargs):
            super().__init__(*args, **kwargs)
            made.append(self)

    monkeypatch.setattr(plots, "_figure_class", lambda: Kept)
    return made


def test_two_pngs_of_the_documented_sizes(tmp_path):
    names = write_plots(tmp_path, _example(2), VALIDATION, ["x", "v"], state_units=["m", "m/s"])
    assert names == [FORECAST_PNG, ERROR_PNG]
    # figsize (8, 2.2·2 + 0.6) and (6.5, 4.2) inches at 110 dpi.
    assert _png_size((tmp_path / FORECAST_PNG).read_bytes()) == (880, 550)
    assert _png_size((tmp_path / ERROR_PNG).read_bytes()) == (715, 462)
    with Image.open(tmp_path / FORECAST_PNG) as image:
        image.verify()  # Pillow checks the chunks and their CRCs


def test_the_forecast_figure_plots_the_example(tmp_path, figures):
    example = _example(2)
    write_plots(tmp_path, example, None, ["x", "v"], state_units=["m", ""], time_unit="min")
    [figure] = figures  # no horizons: no error figure
    axes = figure.axes
    assert [axis.get_ylabel() for axis in axes] == ["x [m]", "v"]
    assert axes[-1].get_xlabel() == "time [min]"
    for component, axis in enumerate(axes):
        lines = {line.get_label(): line for line in axis.get_lines()}
        for label, values in (("held-out truth", example.truth),
                              ("hierarchical forecast", example.hierarchical),
                              ("finest level only", example.finest_only)):
            np.testing.assert_array_equal(lines[label].get_xdata(), example.times)
            np.testing.assert_array_equal(lines[label].get_ydata(), values[:, component])


def test_a_wide_state_shows_evenly_spaced_components_first_and_last_included(tmp_path, figures):
    names = [f"u{index}" for index in range(40)]
    write_plots(tmp_path, _example(40), None, names)
    # linspace(0, 39, 6) = 0, 7.8, 15.6, 23.4, 31.2, 39, rounded.
    assert [axis.get_ylabel() for axis in figures[0].axes] == \
        ["u0", "u8", "u16", "u23", "u31", "u39"]
    assert len(figures[0].axes) == FORECAST_COMPONENTS
    assert _png_size((tmp_path / FORECAST_PNG).read_bytes()) == (880, round((2.2 * 6 + 0.6)
                                                                            * 110))


def test_the_error_figure_marks_tolerance_and_horizon(tmp_path, figures):
    write_plots(tmp_path, _example(1), VALIDATION, ["x"])
    axis = figures[1].axes[0]
    assert axis.get_xscale() == "log" and axis.get_yscale() == "log"
    lines = {line.get_label(): line for line in axis.get_lines()}
    np.testing.assert_allclose(lines["hierarchical"].get_ydata(), [0.001, 0.004, 0.016])
    np.testing.assert_allclose(lines["finest level only"].get_ydata(), [0.003, 0.012, 0.048])
    assert list(lines["tolerance"].get_ydata()) == [0.05, 0.05]
    assert list(lines["validated horizon"].get_xdata()) == [1.2, 1.2]


def test_without_matplotlib_nothing_is_written(tmp_path, monkeypatch):
    monkeypatch.setitem(sys.modules, "matplotlib.figure", None)  # import now fails
    assert write_plots(tmp_path, _example(2), VALIDATION, ["x", "v"]) == []
    assert list(tmp_path.iterdir()) == []
