"""`load`: from a bundle directory to a ready `Stepper`, checking everything on the way."""

from __future__ import annotations

import os

import numpy as np

from .bundle import open_bundle_root, read_envelope_samples, read_levels, read_manifest
from .compile import make_kernel
from .errors import BundleError, ModelFormatError, StridecastError
from .findings import POLICIES
from .graph import build_program
from .limits import DEFAULT_LIMITS, Limits
from .onnx_reader import read_model
from .stepper import Stepper
from .threads import ThreadPolicy

DTYPES = ("float32", "float64")


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
    kernels = {}
    for entry in manifest.levels:
        where = f"level stride {entry.stride} ({entry.file})"
        try:
            # Popped: each file's bytes are freed once parsed (peak memory is a target).
            model = read_model(contents.pop(entry.stride), limits=limits, source=entry.file)
            program = build_program(model, input_name=entry.input, output_name=entry.output,
                                    dtype=compute, max_nodes=limits.max_graph_nodes)
            kernel = make_kernel(program, mean=manifest.mean, scale=manifest.scale,
                                 update=manifest.update, fast_path=fast_path,
                                 policy=policy)
            _probe(kernel, manifest.mean, compute, where)
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
                      envelope_samples=samples, on_extrapolation=on_extrapolation)
    # What `Stepper.__reduce__` needs to load the same bundle the same way elsewhere.
    stepper._load_arguments = (str(root), {"dtype": compute.name, "verify": verify,
                                           "limits": limits, "fast_path": fast_path,
                                           "on_extrapolation": on_extrapolation})
    return stepper


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
