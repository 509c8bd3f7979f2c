"""The demo: the harbour-crane scenario end to end — data, training, export, forecasts, plots.

`run` drives the stages (`crane` physics and ground truth, `settings`, `evaluation`, `output`
texts, `plots`); `options` holds the command's options. Importing this package is light; torch,
SciPy and matplotlib are imported by the stages that use them.

Regenerate the bundle shipped in the package with ``python -m stridecast.demo --ship``.
"""
