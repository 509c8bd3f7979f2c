"""Plain-data descriptions: of a bundle's files (`stridecast inspect`) and of a loaded stepper
(the service's model documents, the benchmark reports)."""

from __future__ import annotations

import json
import os
from collections import Counter
from typing import TYPE_CHECKING, Any

from .bundle import (
    REPORT_NAME,
    open_bundle_root,
    read_envelope_samples,
    read_levels,
    read_manifest,
    read_reduction,
    sha256_hex,
)
from .errors import BundleError, ModelFormatError
from .limits import DEFAULT_LIMITS, Limits
from .manifest import Manifest
from .onnx_reader import read_model
from .reduction import map_form

if TYPE_CHECKING:  # only for the annotation: describe is imported by light callers too
    from .stepper import Stepper


def describe_stepper(stepper: Stepper) -> dict[str, Any]:
    """What a loaded stepper is, as JSON-ready data: the one description of a stepper.

    Returns
    -------
    dict
        ``name``, ``description``; ``state``: ``dim``, ``names``, ``units``; ``time``:
        ``base_step``, ``unit``; ``strides`` (finest first, the levels this stepper runs: a
        `with_levels` subset lists its own); ``update``; ``envelope`` (``min``, ``max`` per
        component of the stepped space, or None); ``validated_horizon`` (None when unknown);
        ``dtype`` (the arithmetic, e.g. "float32"); ``latent_dim`` (None without reduction);
        ``kernel_paths`` (per stride, as a string key, "affine-chain" or "interpreter").
    """
    manifest = stepper.manifest
    envelope = None
    if manifest.envelope_min is not None and manifest.envelope_max is not None:
        envelope = {"min": list(manifest.envelope_min), "max": list(manifest.envelope_max)}
    return {
        "name": manifest.name,
        "description": manifest.description,
        "state": {"dim": stepper.state_dim, "names": list(stepper.state_names),
                  "units": list(stepper.state_units)},
        "time": {"base_step": stepper.base_step, "unit": manifest.time_unit},
        "strides": list(stepper.strides),
        "update": manifest.update,
        "envelope": envelope,
        "validated_horizon": manifest.validated_horizon,
        "dtype": str(stepper.dtype),
        "latent_dim": stepper.latent_dim,
        "kernel_paths": {str(stride): path for stride, path in stepper.kernel_paths.items()},
    }


def describe_bundle(path: str | os.PathLike[str], *, limits: Limits = DEFAULT_LIMITS
                    ) -> dict[str, Any]:
    """Read a bundle, check every file's checksum, and summarise manifest, levels and report.

    Unlike `load`, a checksum mismatch does not stop the description: each level says
    "ok" or "mismatch" under `checksum` (a mismatched level is not parsed), the other files
    the manifest names (envelope samples, encoder, decoder) are listed under `files`, and
    `checksums_ok` says whether everything matched. Unsafe paths and malformed manifests
    still raise `BundleError`. A reduced bundle also gets `reduction`: latent dimension,
    reconstruction threshold, and per map its file, checksum status and form ("linear",
    "affine chain" or "general graph").
    """
    root = open_bundle_root(path)
    manifest = read_manifest(root, limits=limits)
    contents = read_levels(root, manifest, verify=False, limits=limits)
    levels = []
    for entry in manifest.levels:
        data = contents[entry.stride]
        digest = sha256_hex(data)
        level: dict[str, Any] = {
            "stride": entry.stride,
            "stride_time": entry.stride * manifest.base_step,
            "file": entry.file,
            "bytes": len(data),
            "sha256": entry.sha256,
            "checksum": "ok" if digest == entry.sha256 else "mismatch",
        }
        if digest != entry.sha256:
            level.update(actual_sha256=digest, opset=None, producer="", operators={},
                         parameters=None)
        else:
            model = read_model(data, limits=limits, source=entry.file)
            operators = Counter(node.op_type for node in model.graph.nodes)
            level.update(
                opset=model.opset,
                producer=f"{model.producer_name} {model.producer_version}".strip(),
                operators=dict(sorted(operators.items())),
                parameters=sum(int(t.array.size) for t in model.graph.initializers
                               if t.array.dtype.kind == "f"))
        levels.append(level)
    files = []
    for what, reader in (("envelope samples", read_envelope_samples),
                         ("encoder and decoder", read_reduction)):
        try:
            present = reader(root, manifest, verify=True, limits=limits)
        except BundleError as error:
            files.append({"what": what, "checksum": "mismatch", "error": str(error)})
            continue
        if present is not None:
            files.append({"what": what, "checksum": "ok", "error": None})
    report = None
    report_path = root / REPORT_NAME
    if report_path.is_file() and not report_path.is_symlink():
        try:
            text = report_path.read_text(encoding="utf-8")[: limits.max_manifest_bytes]
            report = json.loads(text)
        except ValueError as error:
            raise BundleError(f"`{REPORT_NAME}` is not valid JSON: {error}.") from error
    plots = sorted(item.name for item in root.iterdir()
                   if item.suffix == ".png" and item.is_file() and not item.is_symlink())
    checksums_ok = (all(level["checksum"] == "ok" for level in levels)
                    and all(item["checksum"] == "ok" for item in files))
    return {"path": str(root), "manifest": manifest.to_dict(), "levels": levels,
            "files": files, "checksums_ok": checksums_ok, "plots": plots, "report": report,
            "reduction": _reduction(root, manifest, limits)}


def _reduction(root, manifest: Manifest, limits: Limits) -> dict[str, Any] | None:
    """The encoder and decoder of a reduced bundle, described without stopping at a bad
    checksum (its status is "mismatch" and the form is not read)."""
    reduction = manifest.reduction
    if reduction is None:
        return None
    contents = read_reduction(root, manifest, verify=False, limits=limits)
    maps = {}
    for side, entry, data in (("encoder", reduction.encoder, contents[0]),
                              ("decoder", reduction.decoder, contents[1])):
        ok = sha256_hex(data) == entry.sha256
        described: dict[str, Any] = {"file": entry.file, "sha256": entry.sha256,
                                     "bytes": len(data), "checksum": "ok" if ok else "mismatch",
                                     "form": None, "operators": {}, "parameters": None}
        if ok:
            model = read_model(data, limits=limits, source=entry.file)
            try:
                described["form"] = map_form(model, max_nodes=limits.max_graph_nodes)
            except ModelFormatError as error:
                described["form"] = f"unreadable: {error}"
            described["operators"] = dict(sorted(Counter(
                node.op_type for node in model.graph.nodes).items()))
            described["parameters"] = sum(int(t.array.size) for t in model.graph.initializers
                                          if t.array.dtype.kind == "f")
        maps[side] = described
    return {"latent_dim": reduction.latent_dim,
            "reconstruction_threshold": reduction.reconstruction_threshold, **maps}
