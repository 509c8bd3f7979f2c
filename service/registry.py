"""The models a service holds: found on disk, loaded and verified once, at start.

A bundle that fails to load is kept as a failed entry (with the reason) so `/v1/models` can
report it; only loaded entries are served.
"""

from __future__ import annotations

import logging
import os
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import stridecast.runtime as runtime
from stridecast.runtime.bundle import model_name
from stridecast.runtime.errors import StridecastError

logger = logging.getLogger("stridecast.service")

MANIFEST_NAME = "manifest.json"
ModelSource = str | os.PathLike[str] | Any  # a path, or an already-loaded Stepper


@dataclass(frozen=True)
class ModelEntry:
    """One named model: its stepper when loaded, otherwise why it failed."""

    name: str
    source: str
    stepper: Any = None
    error: str | None = None

    @property
    def ready(self) -> bool:
        return self.stepper is not None


@dataclass(frozen=True)
class Registry:
    """All models of an app, by name, in the order they were given."""

    entries: tuple[ModelEntry, ...] = ()
    loaded: bool = False

    def get(self, name: str) -> ModelEntry | None:
        for entry in self.entries:
            if entry.name == name:
                return entry
        return None

    @property
    def served(self) -> tuple[ModelEntry, ...]:
        return tuple(entry for entry in self.entries if entry.ready)

    @property
    def ready(self) -> bool:
        """Loading has finished and at least one model can be served."""
        return self.loaded and bool(self.served)



def is_bundle(path: Path) -> bool:
    return (path / MANIFEST_NAME).is_file()


def discover(path: str | os.PathLike[str]) -> list[tuple[str, Path]]:
    """Name the bundles at `path`: the bundle itself, or each bundle folder inside it.

    The name of a model is the name of its bundle folder, less a `.bundle` suffix
    (`crane-demo.bundle` serves as `crane-demo`). A folder that is neither a bundle nor holds
    one is returned as itself, so that loading reports it.
    """
    root = Path(path)
    if root.is_dir() and not is_bundle(root):
        children = sorted(child for child in root.iterdir()
                          if child.is_dir() and is_bundle(child))
        if children:
            return [(model_name(child), child) for child in children]
    return [(model_name(root.resolve()) or str(root), root)]


def _is_path(source: Any) -> bool:
    return isinstance(source, str | os.PathLike)


def named_sources(models: Mapping[str, ModelSource] | Iterable[ModelSource]
                  ) -> list[tuple[str, str, ModelSource]]:
    """Expand `models` into (name, description of the source, path or stepper) triples.

    Raises `TypeError` or `ValueError` for arguments that are not models at all (a programming
    error, unlike a bundle that fails to load).
    """
    named: list[tuple[str, str, ModelSource]] = []
    if isinstance(models, Mapping):
        for name, source in models.items():
            if not isinstance(name, str) or not name or "/" in name:
                raise ValueError(f"model name {name!r} must be a non-empty string without '/'.")
            _check_source(name, source)
            named.append((name, str(source) if _is_path(source) else repr(source), source))
        return named
    if _is_path(models):
        raise TypeError("`models` must be a mapping or a list of paths; got a single path "
                        f"{str(models)!r} (wrap it in a list).")
    for index, source in enumerate(models):
        if _is_path(source):
            named.extend((name, str(path), path) for name, path in discover(source))
        else:
            name = getattr(getattr(source, "manifest", None), "name", "") or f"model-{index}"
            _check_source(name, source)
            named.append((name, repr(source), source))
    return named


def _check_source(name: str, source: Any) -> None:
    if not _is_path(source) and not isinstance(source, runtime.Stepper):
        raise TypeError(f"model {name!r} is a {type(source).__name__}; expected a bundle path "
                        "or a stridecast.runtime.Stepper.")


def load_registry(sources: Iterable[tuple[str, str, ModelSource]], *,
                  dtype: str = "float32", threads: int = 1) -> Registry:
    """Load and verify every model; failures become entries with an `error`, never exceptions.

    Parameters
    ----------
    sources : iterable of (name, description, source)
        From `named_sources`; a source is a bundle path or a loaded `Stepper`.
    dtype : {"float32", "float64"}
        Arithmetic of the steppers loaded from paths.
    threads : int
        Threads each stepper loaded from a path splits large batches over.
    """
    entries: list[ModelEntry] = []
    for name, description, source in sources:
        if any(entry.name == name for entry in entries):
            error = f"the name {name!r} is already taken by another model; rename the folder."
            entries.append(ModelEntry(name, description, error=error))
            logger.error("model %r from %s not served: %s", name, description, error)
            continue
        entries.append(_load_one(name, description, source, dtype, threads))
    return Registry(entries=tuple(entries), loaded=True)


def _load_one(name: str, description: str, source: ModelSource, dtype: str,
              threads: int = 1) -> ModelEntry:
    if not _is_path(source):
        return ModelEntry(name, description, stepper=source)
    try:
        # Findings travel in every answer; a Python warning in the server would reach no client.
        stepper = runtime.load(source, dtype=dtype, verify=True, threads=threads,
                               on_extrapolation="ignore")
    except (StridecastError, OSError) as error:
        logger.error("model %r from %s not served: %s", name, description, error)
        return ModelEntry(name, description, error=str(error))
    logger.info("model %r loaded from %s: %s", name, description, stepper)
    return ModelEntry(name, description, stepper=stepper)
