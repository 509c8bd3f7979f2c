"""A plain-data description of a bundle: what `stridecast inspect` and the service show."""

from __future__ import annotations

import json
import os
from collections import Counter
from typing import Any

from .bundle import (
    REPORT_NAME,
    open_bundle_root,
    read_envelope_samples,
    read_levels,
    read_manifest,
    read_reduction,
)
from .errors import BundleError
from .limits import DEFAULT_LIMITS, Limits
from .onnx_reader import read_model


def describe_bundle(path: str | os.PathLike[str], *, limits: Limits = DEFAULT_LIMITS
                    ) -> dict[str, Any]:
    """Read a bundle, verify its checksums, and summarise manifest, levels and report."""
    root = open_bundle_root(path)
    manifest = read_manifest(root, limits=limits)
    contents = read_levels(root, manifest, verify=True, limits=limits)
    read_envelope_samples(root, manifest, verify=True, limits=limits)  # checksum and shape
    read_reduction(root, manifest, verify=True, limits=limits)  # encoder/decoder checksums
    levels = []
    for entry in manifest.levels:
        model = read_model(contents[entry.stride], limits=limits, source=entry.file)
        operators = Counter(node.op_type for node in model.graph.nodes)
        parameters = sum(int(t.array.size) for t in model.graph.initializers
                         if t.array.dtype.kind == "f")
        levels.append({
            "stride": entry.stride,
            "stride_time": entry.stride * manifest.base_step,
            "file": entry.file,
            "bytes": len(contents[entry.stride]),
            "sha256": entry.sha256,
            "checksum": "ok",
            "opset": model.opset,
            "producer": f"{model.producer_name} {model.producer_version}".strip(),
            "operators": dict(sorted(operators.items())),
            "parameters": parameters,
        })
    report = None
    report_path = root / REPORT_NAME
    if report_path.is_file() and not report_path.is_symlink():
        try:
            text = report_path.read_text(encoding="utf-8")[: limits.max_manifest_bytes]
            report = json.loads(text)
        except ValueError as error:
            raise BundleError(f"`{REPORT_NAME}` is not valid JSON: {error}.") from error
    return {"path": str(root), "manifest": manifest.to_dict(), "levels": levels,
            "report": report}
