"""stridecast benchmarks: the runtime against onnxruntime, torch eager, naive rollout and SciPy.

Run ``python -m benchmarks`` from the repository root (see docs/benchmarks.md). The
`bundle_bench.run(bundle)` entry point measures any bundle (`stridecast bench BUNDLE`).
"""
