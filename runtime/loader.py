"""`load`: from a bundle directory to a ready `Stepper`, checking everything on the way."""

from __future__ import annotations

import os

import numpy as np

from .bundle import (
    open_bundle_root,
    read_envelope_samples,
    read_levels,
    read_manifest,
    read_reduction,
)
from .compile import make_kernel
from .errors import BundleError, ModelFormatError, StridecastError
from .findings import POLICIES
from .graph import build_program
from .limits import DEFAULT_LIMITS, Limits
from .onnx_reader import read_model
from .reduction import LatentMaps, make_map, map_names
from .stepper import Stepper
from .threads import ThreadPolicy
from .validation import DTYPES


def load(path: str | os.PathLike[str], *, dtype: str = "float32", verify: bool = True,
         limits: Limits = DEFAULT_LIMITS, fast_path: bool = True,
         on_extrapolation: str = "warn", threads: int | None = None) -> Stepper:
    """Load a bundle directory and return a `Stepper`.

    Parameters
    ----------
    path : path-like
        The bundle directory (holding ``manifest.json`` and ``levels/``).
    dtype : {"float32", "float64"}
        Compute precision. Networks are usually trained in float32; float64 is for exact
        reference models and for studying rounding.
    verify : bool
        Check each level file's SHA-256 against the manifest (default). Paths are always
        checked, whatever this says.
    limits : Limits
        Size and work limits (file sizes, tensor sizes, steps per query, batch size).
    fast_path : bool
        Use the compiled affine-chain kernels where the graph allows (default); False runs
        every level in the generic interpreter.
    on_extrapolation : {"warn", "error", "ignore"}
        What `advance` and `forecast` do when a state they visit leaves the training
        envelope (the min/max box, or farther than the radius from the kept training
        samples) or a requested time passes the validated horizon: issue one
        `ExtrapolationWarning` per call (default), raise `ExtrapolationError`, or nothing.
        The findings are in `Plan.findings` / `ForecastInfo.findings` in every case.
    threads : int, optional
        Threads a large batch is split over (default: the CPUs this process may use, from
        ``os.sched_getaffinity`` where available). Batches of 32 states or more run with BLAS
        at one thread, restoring the caller's setting afterwards; 1 never splits. Batches
        below that run as called. See the README's "Threads" section.
    """
    if on_extrapolation not in POLICIES:
        raise BundleError(
            f"`on_extrapolation` is {on_extrapolation!r}; expected one of {list(POLICIES)}."
        )
    if dtype not in DTYPES and np.dtype(dtype).name not in DTYPES:
        raise BundleError(f"`dtype` is {dtype!r}; expected one of {list(DTYPES)}.")
    compute = np.dtype(dtype)
    policy = ThreadPolicy(threads)
    root = open_bundle_root(path)
    manifest = read_manifest(root, limits=limits)
    too_large = [entry.stride for entry in manifest.levels if entry.stride > limits.max_stride]
    if too_large:
        raise BundleError(
            f"`levels` strides {too_large} exceed the limit of {limits.max_stride} base steps "
            "(`Limits.max_stride`)."
        )
    contents = read_levels(root, manifest, verify=verify, limits=limits)
    reduced = read_reduction(root, manifest, verify=verify, limits=limits)
    maps = None
    # Levels of a reduced bundle step the latent state, with identity normalisation: the
    # manifest's normalisation belongs to the full state and is folded into the maps.
    level_mean, level_scale = manifest.mean, manifest.scale
    if reduced is not None:
        maps = _latent_maps(manifest, reduced, compute, fast_path, policy, limits)
        level_mean = (0.0,) * maps.latent_dim
        level_scale = (1.0,) * maps.latent_dim
    kernels = {}
    for entry in manifest.levels:
        where = f"level stride {entry.stride} ({entry.file})"
        try:
            # Popped: each file's bytes are freed once parsed (peak memory is a target).
            model = read_model(contents.pop(entry.stride), limits=limits, source=entry.file)
            program = build_program(model, input_name=entry.input, output_name=entry.output,
                                    dtype=compute, max_nodes=limits.max_graph_nodes)
            kernel = make_kernel(program, mean=level_mean, scale=level_scale,
                                 update=manifest.update, fast_path=fast_path,
                                 policy=policy)
            _probe(kernel, level_mean, compute, where)
        except ModelFormatError as error:
            raise type(error)(f"{where}: {error}") from error
        except StridecastError:
            raise
        except (ValueError, TypeError, IndexError, KeyError) as error:
            raise ModelFormatError(f"{where}: the network cannot be prepared: {error}.") \
                from error
        kernels[entry.stride] = kernel
    samples = read_envelope_samples(root, manifest, verify=verify, limits=limits)
    stepper = Stepper(manifest, kernels, dtype=compute, limits=limits, source=str(root),
                      envelope_samples=samples, on_extrapolation=on_extrapolation,
                      reduction=maps)
    # What `Stepper.__reduce__` needs to load the same bundle the same way elsewhere.
    stepper._load_arguments = (str(root), {"dtype": compute.name, "verify": verify,
                                           "limits": limits, "fast_path": fast_path,
                                           "on_extrapolation": on_extrapolation})
    return stepper


def _latent_maps(manifest, contents: tuple[bytes, bytes], compute: np.dtype, fast_path: bool,
                 policy: ThreadPolicy, limits: Limits) -> LatentMaps:
    """Build and probe the encoder and decoder of a reduced bundle."""
    reduction = manifest.reduction
    dim, latent_dim = manifest.state_dim, reduction.latent_dim
    maps = {}
    for side, entry, data in (("encoder", reduction.encoder, contents[0]),
                              ("decoder", reduction.decoder, contents[1])):
        where = f"the {side} ({entry.file})"
        try:
            model = read_model(data, limits=limits, source=entry.file)
            input_name, output_name = map_names(model)
            program = build_program(model, input_name=input_name, output_name=output_name,
                                    dtype=compute, max_nodes=limits.max_graph_nodes)
            function = make_map(program, side=side, mean=manifest.mean, scale=manifest.scale,
                                latent_dim=latent_dim, fast_path=fast_path, policy=policy)
            width_in, width_out = (dim, latent_dim) if side == "encoder" else (latent_dim, dim)
            probe = (np.tile(np.asarray(manifest.mean, dtype=compute), (2, 1))
                     if side == "encoder" else np.zeros((2, latent_dim), dtype=compute))
            _probe_map(function, probe, width_out)
        except ModelFormatError as error:
            raise type(error)(f"{where}: {error}") from error
        except StridecastError:
            raise
        except (ValueError, TypeError, IndexError, KeyError) as error:
            raise ModelFormatError(
                f"{where}: the network cannot be prepared for `reduction.latent_dim` = "
                f"{latent_dim} (it must map (batch, {width_in}) to (batch, {width_out})): "
                f"{error}."
            ) from error
        maps[side] = function
    return LatentMaps(latent_dim=latent_dim, encoder=maps["encoder"], decoder=maps["decoder"])


def _probe_map(function, states: np.ndarray, width_out: int) -> None:
    """Run an encoder or decoder once on a batch of two to check its output shape."""
    with np.errstate(all="ignore"):
        result = np.asarray(function(states))
    if result.shape != (states.shape[0], width_out):
        raise ModelFormatError(
            f"the network maps a batch of shape {states.shape} to shape {result.shape}; "
            f"expected ({states.shape[0]}, {width_out}) (`reduction.latent_dim` and "
            "`state.dim` give the widths)."
        )


def _probe(kernel, mean, dtype: np.dtype, where: str) -> None:
    """Run the level once on two copies of the mean state to check its output shape."""
    states = np.tile(np.asarray(mean, dtype=dtype), (2, 1))
    try:
        with np.errstate(all="ignore"):
            result = np.asarray(kernel(states))
    except ModelFormatError:
        raise
    except (ValueError, TypeError, IndexError, KeyError) as error:
        raise ModelFormatError(f"the network cannot run on a batch of states: {error}.") \
            from error
    if result.shape != states.shape:
        raise ModelFormatError(
            f"the network maps a batch of shape {states.shape} to shape {result.shape}; "
            f"a level must map (batch, {states.shape[1]}) to (batch, {states.shape[1]})."
        )
