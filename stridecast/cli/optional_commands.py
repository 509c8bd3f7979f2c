"""Parsers and handlers of the commands whose parts need optional extras.

`demo`, `train` and `export` need torch (`pip install "stridecast[export]"`); `serve` needs
the service extra; `bench` needs onnxruntime and torch for its peers. Each handler imports its
part only when run, and says which extra is missing if the import fails.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from stridecast.demo.options import add_arguments as add_demo_arguments

from .common import bundle_path, needs_extra, shipped_bundle
from .parsing import DeprecatedAlias, add_command


def register(subparsers) -> None:
    demo = add_command(
        subparsers, "demo", "Train, export, reload and evaluate an invented harbour scenario "
               "(the crane by default; --scenario mooring for a field).",
               "stridecast demo --quick --scenario mooring",
               "stridecast.cli.optional_commands:demo_command")
    add_demo_arguments(demo)


    export = add_command(
        subparsers, "export", "Export per-stride torch programs to a verified bundle.",
                 "stridecast export --level 1=fine.pt2 --level 16=coarse.pt2 --base-step 0.05 "
                 "--normalization stats.json -o my.bundle",
                 "stridecast.cli.optional_commands:export_command")
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

    serve = add_command(subparsers, "serve", "Serve bundles over HTTP (JSON, MessagePack, open "
                "inference protocol v2).", "stridecast serve crane-demo.bundle --port 8000",
                "stridecast.cli.optional_commands:serve_command")
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
                       action=DeprecatedAlias, new_name="--compute-slots")
    serve.add_argument("--threads", "--blas-threads", dest="threads", type=int, default=None,
                       help="threads one request splits a large batch over, per worker "
                       "process (default: 1; BLAS runs single-threaded around large batches)")
    serve.add_argument("--max-abs-value", type=float, default=None, metavar="X",
                       help="largest magnitude of a state component a request may hold (422 "
                       "beyond; the OpenAPI document states it) (default: none, i.e. whatever "
                       "the model's dtype holds)")
    serve.add_argument("--max-coarse-steps", type=int, default=None, metavar="N",
                       help="evaluations of a model's coarsest level one answer may take; each "
                       "model's longest accepted time is N x its largest stride x its base "
                       "step (422 beyond) (default: none, i.e. a quarter of the runtime's "
                       "per-query budget: 250,000)")

    bench = add_command(
        subparsers, "bench", "Benchmark a bundle against onnxruntime, torch and the "
                "naive rollout.", "stridecast bench crane-demo.bundle --quick",
                "stridecast.cli.optional_commands:bench_command")
    bench.add_argument("bundle", nargs="?", help="bundle directory")
    bench.add_argument("--demo", action="store_true", help="the bundle shipped in the package")
    bench.add_argument("--quick", action="store_true", help="short run")
    bench.add_argument("--json-out", default=None, metavar="FILE",
                       help="also write the results as JSON to FILE")
    bench.add_argument("--json", dest="json_out", metavar="FILE", action=DeprecatedAlias,
                       new_name="--json-out")


def demo_command(arguments: argparse.Namespace) -> int:
    with needs_extra("all"):
        from stridecast.demo import run
    return run.main(arguments)


def export_command(arguments: argparse.Namespace) -> int:
    with needs_extra("export"):
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

    with needs_extra("service"):
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
    for option in ("max_abs_value", "max_coarse_steps"):
        if getattr(arguments, option) is not None:
            overrides[option] = getattr(arguments, option)
    if arguments.grpc_port is not None:
        overrides.update(grpc_port=arguments.grpc_port, grpc_host=arguments.host)
    _log_to_stderr("stridecast.service")
    from pydantic import ValidationError

    try:
        serve(paths, host=arguments.host, port=arguments.port, workers=arguments.workers,
              token_file=arguments.token_file,
              on_ready=lambda: print(CAUTION, file=sys.stderr), **overrides)
    except ValidationError as error:
        # The bounds live in Settings; say which option (or environment variable) broke one:
        # a bad option is a usage error (2), a bad environment variable a failure (1).
        fields = [str(problem["loc"][0]) if problem["loc"] else "settings"
                  for problem in error.errors()]
        for field, problem in zip(fields, error.errors(), strict=True):
            name = (f"`{_FLAGS.get(field, '--' + field.replace('_', '-'))}`"
                    if field in overrides else f"`STRIDECAST_{field.upper()}`")
            print(f"stridecast serve: error: {name} is {problem.get('input')!r}; "
                  f"{problem['msg'][0].lower()}{problem['msg'][1:]}.", file=sys.stderr)
        return 2 if any(field in overrides for field in fields) else 1
    return 0


# Settings fields whose serve option has another name.
_FLAGS = {"max_concurrency": "--compute-slots"}


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

    with needs_extra("dev"):
        from stridecast.benchmarks import bundle_bench
    result = bundle_bench.run(bundle_path(arguments), quick=arguments.quick)
    print(bundle_bench.to_markdown(result))
    if arguments.json_out:
        import json

        Path(arguments.json_out).write_text(json.dumps(result, indent=2, default=str) + "\n")
    return 0
