"""The demo's figures: written as PNG files, and carrying what a reader needs to judge them.

The figures are drawn from a small hand-made `Evaluation` (made-up curves are fine here: what
is checked is the figures' content, read back through matplotlib's own artist objects). A PNG
file starts with the eight signature bytes of the PNG specification (RFC 2083, section 3.1).
"""

from __future__ import annotations

import numpy as np
import pytest

matplotlib = pytest.importorskip("matplotlib", reason="the demo extra draws the plots")
matplotlib.use("Agg")
from matplotlib import pyplot  # noqa: E402

from stridecast.demo import plots  # noqa: E402
from stridecast.demo.evaluation import Evaluation  # noqa: E402
from stridecast.demo.settings import QUICK  # noqa: E402

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
HORIZON = 6.4


def _evaluation(*, runaway: bool = True) -> Evaluation:
    grid = np.arange(0, 12.0 + 1e-9, 0.04)
    phase = np.stack([np.sin(grid), -24 + 0.02 * np.cos(9 * grid), np.cos(grid),
                      -0.2 * np.sin(9 * grid)], axis=1)
    truth = np.repeat(phase[:, None, :], 3, axis=1)
    times = np.arange(0, 12.0 + 1e-9, 0.4)
    # Bounded: at most 0.4 m; runaway: past the cable's length, then past the float range.
    finest = 1e-3 * np.exp(times) if runaway else 1e-3 * np.exp(times / 2)
    if runaway:
        finest[-3:] = np.inf
    return Evaluation(
        states=truth[0], grid=grid, truth=truth, finest=truth * 1.01,
        example_forecast=phase * 0.99, table=(), hybrid=(),
        curves={"times": list(times), "finest": list(finest),
                "hierarchical": list(0.01 + 0.001 * times),
                "hybrid": list(1e-6 + 0.001 * times)},
        check={}, strides=(1, 5, 25), validated_horizon=HORIZON,
        envelope=((-1.0, -24.1, -1.0, -0.3), (1.0, -23.9, 1.0, 0.3)))


def _texts(figure) -> list[str]:
    return [text.get_text() for text in figure.findobj(matplotlib.text.Text)]


def test_write_plots_writes_two_png_files(tmp_path):
    paths = plots.write_plots(tmp_path / "plots", _evaluation(), QUICK)
    assert [path.name for path in paths] == [plots.FORECAST_PNG, plots.ERROR_PNG]
    for path in paths:
        assert path.read_bytes()[:8] == PNG_SIGNATURE
    assert pyplot.get_fignums() == []  # every figure closed


def test_forecast_figure_titles_legend_envelope_and_horizon():
    figure = plots.forecast_figure(pyplot, _evaluation(), "")
    try:
        axes = figure.axes
        titles = [axis.get_title() for axis in axes]
        assert len(axes) == 3 and len(set(titles)) == 3, titles  # distinct titles
        (legend,) = [axis.get_legend() for axis in axes if axis.get_legend() is not None]
        # Off the curves: the legend's box lies right of its axes' box, in display space.
        figure.canvas.draw()
        assert legend.get_window_extent().x0 >= axes[0].get_window_extent().x1
        labels = [text.get_text() for text in legend.get_texts()]
        assert plots.ENVELOPE_LABEL in labels
        assert any(label.startswith(f"{plots.HORIZON_LABEL} ({HORIZON:g} s)")
                   for label in labels)
        # The horizon line stands at x = HORIZON; the envelope bounds of x at -1 and 1.
        vertical = [line for line in axes[0].get_lines()
                    if line.get_label().startswith(plots.HORIZON_LABEL)]
        assert [tuple(line.get_xdata()) for line in vertical] == [(HORIZON, HORIZON)]
        horizontal = sorted(line.get_ydata()[0] for line in axes[0].get_lines()
                            if line.get_linestyle() == ":")
        assert horizontal == [-1.0, 1.0]
    finally:
        pyplot.close(figure)


def test_error_figure_separates_hierarchical_and_hybrid_and_explains_runaway():
    figure = plots.error_figure(pyplot, _evaluation(), "")
    try:
        (axis,) = figure.axes
        by_label = {line.get_label().split(" ")[0]: line for line in axis.get_lines()}
        hierarchical, hybrid = by_label["hierarchical"], by_label["hybrid"]
        # Distinguishable even where the curves coincide: style, width and markers differ.
        assert hierarchical.get_linestyle() != hybrid.get_linestyle()
        assert hierarchical.get_linewidth() > hybrid.get_linewidth()
        assert hybrid.get_marker() not in (None, "None", "")
        assert any(text.startswith(plots.RUNAWAY_LABEL) for text in _texts(figure))
        assert any(label.startswith(plots.HORIZON_LABEL)
                   for label in (line.get_label() for line in axis.get_lines()))
        figure.canvas.draw()
        legend = axis.get_legend()
        assert legend.get_window_extent().x0 >= axis.get_window_extent().x1
    finally:
        pyplot.close(figure)


def test_no_runaway_note_when_every_rollout_stays_bounded():
    figure = plots.error_figure(pyplot, _evaluation(runaway=False), "")
    try:
        assert not any(text.startswith(plots.RUNAWAY_LABEL) for text in _texts(figure))
    finally:
        pyplot.close(figure)
