"""Parsers and handlers of the commands whose parts need optional extras.

`demo`, `train` and `export` need torch (`pip install "stridecast[export]"`); `serve` needs
the service extra; `bench` needs onnxruntime and torch for its peers. Each handler imports its
part only when run, and says which extra is missing if the import fails.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

EXTRAS = {
    "torch": "export", "onnx": "export", "onnxscript": "export", "tqdm": "export",
    "fastapi": "service", "uvicorn": "service", "msgpack": "service",
    "prometheus_client": "service", "pydantic_settings": "service", "anyio": "service",
    "pydantic": "service",
    "scipy": "demo", "matplotlib": "plot", "onnxruntime": "dev",
}


def register(subparsers, add, deprecated_alias) -> None:
    demo = add(subparsers, "demo", "Train, export, reload and evaluate the harbour-crane demo.",
               "stridecast demo --quick", "stridecast.commands_optional:demo_command")
    demo.add_argument("--out", default="crane-demo.bundle", help="bundle folder to write "
                      "(default: %(default)s)")
    demo.add_argument("--quick", action="store_true",
                      help="smaller data and networks: ~30 s, lower accuracy")
    demo.add_argument("--overwrite", action="store_true", help="replace an existing bundle")
    demo.add_argument("--no-progress", action="store_true", help="no progress bars")
    demo.add_argument("--plots-dir", default=None,
                      help="where forecast.png and error.png go (default: inside the "
                      "bundle folder)")

    from . import commands_train

    commands_train.register(subparsers, add)

    export = add(subparsers, "export", "Export per-stride torch programs to a verified bundle.",
                 "stridecast export --level 1=fine.pt2 --level 16=coarse.pt2 --base-step 0.05 "
                 "--normalization stats.json -o my.bundle",
                 "stridecast.commands_optional:export_command")
    export.add_argument("--level", action="append", required=True, metavar="STRIDE=FILE",
                        help="a torch.export program (.pt2) or TorchScript file; repeat")
    export.add_argument("--base-step", type=float, required=True, metavar="SECONDS",
                        help="time of one step of the stride-1 level, in --time-unit")
    export.add_argument("--normalization", default=None, metavar="STATS.json",
                        help="JSON with mean and scale (optional state_names, units, envelope)")
    export.add_argument("--update", choices=("increment", "replace"), default="increment",
                        help="what a network returns: increment (next = state + output) or "
                        "replace (next = output) (default: %(default)s)")
    export.add_argument("--name", default=None,
                        help="bundle name in its manifest (default: the folder name)")
    export.add_argument("--time-unit", default="s",
                        help="unit of --base-step and of forecast times (default: %(default)s)")
    export.add_argument("-o", "--out", required=True, help="bundle folder to write")
    export.add_argument("--overwrite", action="store_true", help="replace an existing bundle")

    serve = add(subparsers, "serve", "Serve bundles over HTTP (JSON, MessagePack, open "
                "inference protocol v2).", "stridecast serve crane-demo.bundle --port 8000",
                "stridecast.commands_optional:serve_command")
    serve.add_argument("paths", nargs="*", help="bundles, or folders of bundles")
    serve.add_argument("--demo", action="store_true", help="also serve the shipped demo bundle")
    serve.add_argument("--host", default="127.0.0.1",
                       help="address to listen on; 0.0.0.0 for every interface "
                       "(default: %(default)s, this machine only)")
    serve.add_argument("--port", type=int, default=8000, help="TCP port (default: %(default)s)")
    serve.add_argument("--workers", type=int, default=1,
                       help="worker processes, each loading every bundle (default: %(default)s)")
    serve.add_argument("--grpc-port", type=int, default=None, metavar="PORT",
                       help="also serve the open inference protocol over gRPC on PORT, same "
                            "host (needs stridecast[grpc])")
    serve.add_argument("--token-file", default=None,
                       help="file holding the bearer token POST routes require")
    serve.add_argument("--compute-slots", type=int, default=None, metavar="N",
                       help="requests computing at once, per worker process; more wait their "
                       "turn (default: CPU count)")
    # The old name borrowed uvicorn's flag, which means something else (open connections).
    serve.add_argument("--limit-concurrency", type=int, dest="compute_slots",
                       action=deprecated_alias, new_name="--compute-slots")
    serve.add_argument("--threads", "--blas-threads", dest="threads", type=int, default=None,
                       help="threads one request splits a large batch over, per worker "
                       "process (default: 1; BLAS runs single-threaded around large batches)")

    bench = add(subparsers, "bench", "Benchmark a bundle against onnxruntime, torch and the "
                "naive rollout.", "stridecast bench crane-demo.bundle --quick",
                "stridecast.commands_optional:bench_command")
    bench.add_argument("bundle", nargs="?", help="bundle directory")
    bench.add_argument("--demo", action="store_true", help="the bundle shipped in the package")
    bench.add_argument("--quick", action="store_true", help="short run")
    bench.add_argument("--json-out", default=None, metavar="FILE",
                       help="also write the results as JSON to FILE")
    bench.add_argument("--json", dest="json_out", metavar="FILE", action=deprecated_alias,
                       new_name="--json-out")


def _needs(extra_hint: str):
    """Turn a missing optional dependency into a one-line instruction."""

    class _Guard:
        def __enter__(self):
            return self

        def __exit__(self, kind, error, traceback):
            if kind is ModuleNotFoundError:
                package = (error.name or "").split(".")[0]
                extra = EXTRAS.get(package, extra_hint)
                # Not on any package index: the extra comes from the repository's clone.
                print(f"stridecast: this command needs the {extra!r} extra (missing module "
                      f"{package!r}); install it from the repository folder with "
                      f'pip install -e ".[{extra}]"', file=sys.stderr)
                raise SystemExit(1) from error
            return False

    return _Guard()


def demo_command(arguments: argparse.Namespace) -> int:
    with _needs("all"):
        from stridecast import demo
    return demo.main(arguments)


def export_command(arguments: argparse.Namespace) -> int:
    with _needs("export"):
        from stridecast.export.cli_support import export_from_files, parse_level_option
    # A list, not a dict: export_from_files refuses a repeated stride instead of dropping it.
    levels = [parse_level_option(text) for text in arguments.level]
    path = export_from_files(
        levels, arguments.out, base_step=arguments.base_step,
        normalization_json=arguments.normalization, update=arguments.update,
        name=arguments.name, overwrite=arguments.overwrite, time_unit=arguments.time_unit)
    print(f"wrote the verified bundle {path}")
    return 0


def serve_command(arguments: argparse.Namespace) -> int:
    from stridecast.caution import CAUTION
    from stridecast.commands_runtime import shipped_bundle

    with _needs("service"):
        from stridecast.service.server import serve
    paths = [Path(p) for p in arguments.paths]
    if arguments.demo:
        paths.append(shipped_bundle())
    if not paths:
        print("stridecast serve: give at least one bundle path (or --demo).", file=sys.stderr)
        return 2
    overrides = {}
    if arguments.compute_slots is not None:
        overrides["max_concurrency"] = arguments.compute_slots
    if arguments.threads is not None:
        overrides["threads"] = arguments.threads
    if arguments.grpc_port is not None:
        overrides.update(grpc_port=arguments.grpc_port, grpc_host=arguments.host)
    _log_to_stderr("stridecast.service")
    serve(paths, host=arguments.host, port=arguments.port, workers=arguments.workers,
          token_file=arguments.token_file, on_ready=lambda: print(CAUTION, file=sys.stderr),
          **overrides)
    return 0


def _log_to_stderr(name: str) -> None:
    """Show the service's start-up log (models served, models refused) on stderr."""
    import logging

    class _CurrentStderr(logging.StreamHandler):
        def emit(self, record):
            self.stream = sys.stderr  # whatever stderr is now, not when the handler was made
            super().emit(record)

    logger = logging.getLogger(name)
    if not logger.handlers:
        handler = _CurrentStderr()
        handler.setFormatter(logging.Formatter("stridecast serve: %(message)s"))
        logger.addHandler(handler)
        logger.setLevel(logging.INFO)
        logger.propagate = False


def bench_command(arguments: argparse.Namespace) -> int:
    from stridecast.commands_runtime import bundle_path

    with _needs("dev"):
        from stridecast.benchmarks import bundle_bench
    result = bundle_bench.run(bundle_path(arguments), quick=arguments.quick)
    print(bundle_bench.to_markdown(result))
    if arguments.json_out:
        import json

        Path(arguments.json_out).write_text(json.dumps(result, indent=2, default=str) + "\n")
    return 0
