"""stridecast benchmarks: the runtime against onnxruntime, torch eager, naive rollout and SciPy.

Installed as `stridecast.benchmarks` (its only import name): run ``python -m
stridecast.benchmarks`` (see docs/benchmarks.md). The `bundle_bench.run(bundle)` entry point
measures any bundle (`stridecast bench BUNDLE`).
"""

# One import identity: imported as top-level `benchmarks` (from a checkout's root), the same
# modules would load a second time under another name, with their own state.
if __name__ != "stridecast.benchmarks":
    raise ImportError(
        f"the benchmarks were imported as {__name__!r}; expected 'stridecast.benchmarks' "
        "(install the repository with `pip install -e .` and run `python -m "
        "stridecast.benchmarks`)."
    )
