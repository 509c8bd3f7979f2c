"""`train_levels`: one increment MLP per stride, trained on windows cut from trajectories.

Each level minimises the one-step mean squared error plus the mean squared error of a rollout
of `rollout` steps at its own stride, in normalised units. Normalisation comes from the
training split; held-out trajectories give the per-epoch validation loss (early stopping, best
epoch restored) and the validation figures of the bundle. Trajectories may differ in length.

With `reduce`, a POD basis fitted on the training split (`pod`) maps states to standardised
latent coordinates; the levels are trained on latent trajectories, and every validation figure
is measured on the decoded full states.
"""

from __future__ import annotations

import logging
import math
import sys
import time
from collections.abc import Sequence
from dataclasses import asdict, dataclass
from typing import Any

import numpy as np
import torch
from torch import nn
from tqdm.auto import tqdm

from stridecast.runtime.validation import check_strides

from .arguments import check_base_step, check_strings, positive_int
from .data import check_length, check_trajectories
from .envelope import RADIUS_MARGIN, RADIUS_QUANTILE, data_envelope
from .errors import TrainingError
from .held_out import Validation, validate
from .networks import ACTIVATIONS, increment_mlp, parameter_count
from .pod import (
    RECONSTRUCTION_TOLERANCE_SHARE,
    PODBasis,
    check_reduce,
    fit_pod,
    reconstruction_threshold,
)
from .threads import compute_threads
from .trained import TrainedLevels
from .windows import (
    Ragged,
    gather_windows,
    normalisation,
    pooled_normalisation,
    spaced_subset,
    split_trajectories,
    window_starts,
)

logger = logging.getLogger(__name__)
# Windows used for per-epoch validation losses and final one-step errors (evenly spaced).
EVALUATION_WINDOWS = 8192
# The learning rate decays on a cosine to this fraction of its start, for a precise finish.
FINAL_LEARNING_RATE_FRACTION = 0.01


@dataclass(frozen=True)
class TrainingSettings:
    """Checked training settings (JSON-ready through `dataclasses.asdict`)."""

    hidden: tuple[int, ...]
    activation: str
    rollout: int
    epochs: int
    batch_size: int
    learning_rate: float
    validation_fraction: float
    max_windows_per_epoch: int | None
    seed: int
    patience: int | None
    tolerance: float
    horizon: float | None
    keep_all_levels: bool


def train_levels(
    trajectories: Any,
    *,
    base_step: float,
    strides: Sequence[int],
    hidden: Sequence[int] = (128, 128, 128),
    activation: str = "tanh",
    rollout: int = 4,
    epochs: int = 50,
    batch_size: int = 256,
    validation_fraction: float = 0.1,
    seed: int = 0,
    progress: bool = True,
    learning_rate: float = 1e-3,
    tolerance: float = 0.1,
    horizon: float | None = None,
    keep_all_levels: bool = False,
    max_windows_per_epoch: int | None = 65536,
    threads: int | None = 1,
    state_names: Sequence[str] | None = None,
    state_units: Sequence[str] | None = None,
    patience: int | None = 10,
    reduce: int | float | None = None,
) -> TrainedLevels:
    """Train one network per stride on trajectories sampled every `base_step`.

    Parameters
    ----------
    trajectories : array_like (N, T, d) or (T, d), or a list/tuple of arrays (T_i, d)
        States sampled every base step; lengths may differ (ragged). Whole trajectories are
        held out for validation (a single series is split in time).
    base_step : float
        Time between samples. A float32 value counts as the decimal it stands for
        (np.float32(0.01) is 0.01).
    strides : sequence of int
        Distinct positive strides, in base steps.
    hidden, activation
        Hidden widths and activation (a key of `networks.ACTIVATIONS`) of each level's MLP.
    rollout : int
        Steps of the multi-step loss; trajectories need rollout · max(strides) + 1 samples.
    epochs, batch_size, learning_rate
        Adam with a cosine decay to 1 % of `learning_rate` over all batches.
    validation_fraction : float
        Share of trajectories held out, in [0, 1) (a single trajectory is split in time).
    seed : int
        Seeds initialisation, the split and shuffling; the result is reproducible on the same
        machine and thread count. The global torch RNG is left as it was.
    progress : bool
        Show a progress bar on stderr.
    tolerance : float
        Held-out normalised RMS error (per component over its training standard deviation,
        RMS over components and start states) that the validated horizon keeps to.
    horizon : float or None
        Longest forecast horizon (time units) level selection scores; None: the held-out span.
    keep_all_levels : bool
        Deploy every trained level instead of the subset (always with the finest) that
        minimises the held-out error up to `horizon` (docs/export.md, "Level selection").
    max_windows_per_epoch : int or None
        Cap on the windows one epoch visits (a fresh random subset each epoch).
    threads : int or None
        Threads of torch and of NumPy's BLAS while training, validating and fitting the POD
        (both restored afterwards). The default 1 makes results independent of the machine's
        core count (reduction order) and is fastest for small networks, above all on a busy
        machine; None keeps both settings.
    state_names, state_units : sequence of str, optional
        Carried into the bundle. Names matching the first axis of a (T, d) array reveal data
        given as (d, T), which is refused with a hint to transpose.
    patience : int or None
        Stop a level when its held-out validation loss has not improved for this many epochs.
        Whenever there is a validation loss, the weights of the best epoch are restored at the
        end (`history[stride]["best_epoch"]`, `"stop_reason"`). None never stops early.
    reduce : int, float or None
        Train a reduced model (docs/export.md, "Reduced models"): an int r keeps r POD modes
        (1 ≤ r < d), a float in (0, 1) keeps the fewest modes holding that share of the
        training states' energy. The normalisation then uses one scale per unit
        (`state_units`; one for all components without units), the levels step standardised
        latent coordinates, and the result carries the basis (`TrainedLevels.basis`), which
        `export_bundle` writes as encoder and decoder. None: levels on the full state.

    Returns
    -------
    TrainedLevels
        Networks, normalisation, per-level `history` and held-out `validation` figures.
    """
    data = check_trajectories(
        trajectories, state_names=state_names if isinstance(state_names, Sequence) else None)
    settings = _check_settings(hidden=hidden, activation=activation, rollout=rollout,
                               epochs=epochs, batch_size=batch_size, learning_rate=learning_rate,
                               validation_fraction=validation_fraction,
                               max_windows_per_epoch=max_windows_per_epoch, seed=seed,
                               patience=patience,
                               tolerance=tolerance, horizon=horizon,
                               keep_all_levels=keep_all_levels)
    base_step = check_base_step(base_step)
    strides = check_strides(strides)
    _check_horizon(settings.horizon, base_step, strides[0])
    dim = data.dim
    names = None if state_names is None else check_strings(state_names, "state_names", dim,
                                                           distinct=True)
    units = None if state_units is None else check_strings(state_units, "state_units", dim,
                                                           distinct=False)
    reduce = None if reduce is None else check_reduce(reduce, dim)
    check_length(data.lengths, dim, strides, settings.rollout, where="the trajectories")
    # One thread for torch and for NumPy's BLAS by default: the POD's SVD, decoding and the
    # envelope are BLAS calls too, and on a busy machine a second BLAS thread mostly waits
    # (an SVD of 22,000 x 256 snapshots: 12 s with 2 threads under load, 0.8 s with one).
    with compute_threads(threads, error=TrainingError):
        split = split_trajectories(data, settings.validation_fraction, settings.seed)
        check_length(split.train.lengths, dim, strides, settings.rollout,
                     where="the training trajectories (after the split)")
        if reduce is None:
            mean, scale = normalisation(split.train)
            basis = None
        else:
            mean, scale = pooled_normalisation(split.train, units)
            # The normalised training states have mean zero: the POD is centred.
            basis = fit_pod((np.asarray(split.train.values) - mean) / scale, reduce)

        def normalised(values: np.ndarray) -> torch.Tensor:
            return torch.from_numpy(((values - mean) / scale).astype(np.float32))

        def stepped(values: np.ndarray) -> torch.Tensor:
            """The states the levels step: normalised, or latent for a reduced model."""
            if basis is None:
                return normalised(values)
            return torch.from_numpy(basis.encode((values - mean) / scale).astype(np.float32))

        train = split.train.map(stepped)
        held_out = None if split.held_out is None else split.held_out.map(stepped)
        # Validation compares decoded forecasts with the full held-out states.
        held_out_full = held_out if basis is None or held_out is None \
            else split.held_out.map(normalised)

        levels, history = {}, {}
        validation, curve, example = None, None, None
        for stride in strides:
            levels[stride], history[stride] = _train_level(stride, train, held_out, settings,
                                                           progress=progress)
        if held_out is not None:
            # Evaluation takes a list of (T_i, d) tensors: ragged held-out data fit as they are.
            checked = _validate(levels, held_out_full.to_list(), settings, base_step, mean,
                                scale, basis)
            validation = {**checked.figures, "split": split.description}
            curve, example = checked.curve, checked.example
            levels = {stride: levels[stride] for stride in checked.strides}
        # The envelope describes the states the levels step (latent for a reduced model).
        samples, radius = data_envelope(
            _arrays(train), None if held_out is None else _arrays(held_out))
        if basis is None:
            box = split.train.values
            reduction = None
        else:
            box = train.values.numpy()
            reduction = _reduction_figures(basis, split.train.values, split.held_out, mean, scale,
                                           settings.tolerance)
        return TrainedLevels(
            levels=levels, mean=tuple(map(float, mean)), scale=tuple(map(float, scale)),
            base_step=base_step, update="increment", history=history, validation=validation,
            envelope_min=tuple(map(float, box.min(axis=0))),
            envelope_max=tuple(map(float, box.max(axis=0))),
            state_names=names, state_units=units,
            settings={**asdict(settings), "hidden": list(settings.hidden),
                      "strides": list(strides), "base_step": base_step, "threads": threads,
                      "reduce": reduce},
            forecast_example=example, validation_curve=curve, envelope_samples=samples,
            envelope_radius=radius, basis=basis, reduction=reduction,
        )


def _reduction_figures(basis: PODBasis, train: np.ndarray, held_out: Ragged | None,
                       mean: np.ndarray, scale: np.ndarray, tolerance: float) -> dict[str, Any]:
    """The basis summary and the reconstruction-error threshold, JSON-ready.

    The threshold comes from held-out states when there are any (training states are what the
    basis was fitted to, so their errors are optimistic), else from the training states.
    """
    train_errors = basis.reconstruction_errors((np.asarray(train) - mean) / scale)
    held_errors = None if held_out is None else basis.reconstruction_errors(
        (np.asarray(held_out.values) - mean) / scale)
    reference = train_errors if held_errors is None else held_errors
    threshold = reconstruction_threshold(reference, tolerance)

    def quantiles(errors: np.ndarray | None) -> dict[str, float] | None:
        if errors is None:
            return None
        return {"median": float(np.median(errors)), "q99": float(np.quantile(errors, 0.99)),
                "max": float(errors.max()), "states": int(errors.size)}

    return {
        **basis.summary(),
        "normalisation": "per-component mean; one scale per unit (pooled standard deviation)",
        "reconstruction": {
            "metric": "normalised_rms",
            "threshold": threshold,
            "rule": f"max({RADIUS_MARGIN:g} × the {RADIUS_QUANTILE:g} quantile of the "
                    "per-state reconstruction errors of "
                    f"{'held-out' if held_errors is not None else 'training'} states, "
                    f"{RECONSTRUCTION_TOLERANCE_SHARE:g} × tolerance)",
            "train": quantiles(train_errors),
            "held_out": quantiles(held_errors),
        },
    }


def _validate(levels: dict[int, nn.Module], held_out: list[torch.Tensor],
              settings: TrainingSettings, base_step: float, mean: np.ndarray,
              scale: np.ndarray, basis: PODBasis | None) -> Validation:
    """Level selection and the validity figures on normalised (full) held-out trajectories."""
    checked = validate(levels, held_out, base_step=base_step, mean=mean, scale=scale,
                       tolerance=settings.tolerance, horizon=settings.horizon,
                       keep_all_levels=settings.keep_all_levels, reduction=basis)
    summary = checked.figures["summary"]
    logger.info("levels kept: %s (%s); validated horizon %s at tolerance %g",
                summary["kept"], summary["why"], summary["validated_horizon"],
                settings.tolerance)
    return checked


def _train_level(stride: int, train: Ragged, held_out: Ragged | None,
                 settings: TrainingSettings, *, progress: bool) -> tuple[nn.Module, dict]:
    """Train the network of one stride; return it (eval mode, best epoch) and its history.

    `train` and `held_out` hold normalised float32 tensors.
    """
    started = time.perf_counter()
    level_seed = settings.seed * 1_000_003 + stride  # independent of which other levels exist
    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(level_seed)
        model = increment_mlp(train.dim, settings.hidden, settings.activation)
    generator = torch.Generator().manual_seed(level_seed)
    starts = torch.from_numpy(window_starts(train, stride, settings.rollout))
    per_epoch = min(len(starts), settings.max_windows_per_epoch or len(starts))
    batches = math.ceil(per_epoch / settings.batch_size)
    optimizer = torch.optim.Adam(model.parameters(), lr=settings.learning_rate)
    schedule = torch.optim.lr_scheduler.CosineAnnealingLR(
        optimizer, T_max=settings.epochs * batches,
        eta_min=settings.learning_rate * FINAL_LEARNING_RATE_FRACTION)
    check_starts = _evaluation_starts(held_out, stride, settings.rollout)
    train_losses, validation_losses = [], []
    best = _BestEpoch()
    stop_reason = "epochs"
    bar = tqdm(total=settings.epochs * batches, desc=f"stride {stride}", unit="batch",
               file=sys.stderr, disable=not progress, leave=False)
    with bar:
        for epoch in range(1, settings.epochs + 1):
            order = torch.randperm(len(starts), generator=generator)[:per_epoch]
            total = 0.0
            for first in range(0, per_epoch, settings.batch_size):
                windows = gather_windows(train.values,
                                         starts[order[first:first + settings.batch_size]],
                                         stride, settings.rollout)
                loss, _ = window_loss(model, windows)
                optimizer.zero_grad(set_to_none=True)
                loss.backward()
                optimizer.step()
                schedule.step()
                total += float(loss.detach()) * len(windows)
                bar.update(1)
            train_losses.append(total / per_epoch)
            bar.set_postfix(loss=f"{train_losses[-1]:.3g}")
            if check_starts is None:
                continue
            validation_losses.append(_mean_loss(model, held_out, check_starts, stride,
                                                settings.rollout)[0])
            best.offer(epoch, validation_losses[-1], model)
            if settings.patience is not None and epoch - best.epoch >= settings.patience \
                    and epoch < settings.epochs:
                stop_reason = "patience"
                break
    if best.state is not None:
        model.load_state_dict(best.state)
    model.eval()
    train_check = starts[torch.from_numpy(spaced_subset(len(starts), EVALUATION_WINDOWS))]
    entry = {
        "epochs": settings.epochs,
        "epochs_run": len(train_losses),
        "best_epoch": best.epoch or None,
        "best_validation_loss": best.loss if best.state is not None else None,
        "stop_reason": stop_reason,
        "windows": len(starts),
        "parameters": parameter_count(model),
        "train_loss": train_losses,
        "validation_loss": validation_losses or None,
        "train_one_step_mse": _mean_loss(model, train, train_check, stride, settings.rollout)[1],
        "validation_one_step_mse": None if check_starts is None else _mean_loss(
            model, held_out, check_starts, stride, settings.rollout)[1],
        "seconds": round(time.perf_counter() - started, 3),
    }
    logger.info("stride %d: %d epochs (%s), best epoch %s, validation loss %s, one-step MSE "
                "%.3g (train)", stride, len(train_losses), stop_reason, entry["best_epoch"],
                entry["best_validation_loss"], entry["train_one_step_mse"])
    return model, entry


def _arrays(data: Ragged) -> list[np.ndarray]:
    """Each trajectory of a Ragged of tensors as a NumPy array (T_i, d) (no copy)."""
    return [trajectory.numpy() for trajectory in data.to_list()]


class _BestEpoch:
    """The epoch with the lowest finite validation loss so far, and a copy of its weights."""

    def __init__(self) -> None:
        self.epoch, self.loss, self.state = 0, math.inf, None

    def offer(self, epoch: int, loss: float, model: nn.Module) -> None:
        # Strictly lower: a plateau keeps the earlier epoch; NaN never compares lower.
        if loss < self.loss:
            self.epoch, self.loss = epoch, loss
            self.state = {name: value.detach().clone()
                          for name, value in model.state_dict().items()}


def window_loss(model: nn.Module, windows: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
    """Loss of a batch of windows (B, R + 1, d): one-step MSE + mean MSE over the rollout.

    Returns the total and the one-step part.
    """
    state = windows[:, 0]
    rollout_error = windows.new_zeros(())
    one_step = None
    for index in range(1, windows.shape[1]):
        state = state + model(state)
        error = torch.mean((state - windows[:, index]) ** 2)
        one_step = error if one_step is None else one_step
        rollout_error = rollout_error + error
    return one_step + rollout_error / (windows.shape[1] - 1), one_step


def _mean_loss(model: nn.Module, data: Ragged, starts: torch.Tensor, stride: int,
               rollout: int) -> tuple[float, float]:
    with torch.no_grad():
        total, one_step = window_loss(model, gather_windows(data.values, starts, stride,
                                                            rollout))
    return float(total), float(one_step)


def _evaluation_starts(held_out: Ragged | None, stride: int,
                       rollout: int) -> torch.Tensor | None:
    if held_out is None:
        return None
    starts = window_starts(held_out, stride, rollout)
    if len(starts) == 0:
        logger.info("stride %d: held-out trajectories too short for a validation loss", stride)
        return None
    return torch.from_numpy(starts[spaced_subset(len(starts), EVALUATION_WINDOWS)])


def _positive_int(value: Any, where: str) -> int:
    return positive_int(value, where, error=TrainingError)


def _flag(value: Any, where: str) -> bool:
    if not isinstance(value, bool | np.bool_):
        raise TrainingError(f"`{where}` is {value!r}; expected True or False.")
    return bool(value)


def _check_settings(*, hidden, activation, rollout, epochs, batch_size, learning_rate,
                    validation_fraction, max_windows_per_epoch, seed, patience, tolerance,
                    horizon, keep_all_levels) -> TrainingSettings:
    if isinstance(hidden, int) or not isinstance(hidden, Sequence) or not hidden:
        raise TrainingError(f"`hidden` is {hidden!r}; expected a non-empty list of widths.")
    try:
        widths = tuple(_positive_int(width, "hidden") for width in hidden)
    except TrainingError as error:
        raise TrainingError(
            f"`hidden` is {list(hidden)!r}; expected positive integer widths."
        ) from error
    if activation not in ACTIVATIONS:
        raise TrainingError(
            f"`activation` is {activation!r}; expected one of {sorted(ACTIVATIONS)}."
        )
    rate = _positive_number(learning_rate, "learning_rate")
    fraction = (float(validation_fraction)
                if isinstance(validation_fraction, int | float) else math.nan)
    if isinstance(validation_fraction, bool) or not 0 <= fraction < 1:
        raise TrainingError(
            f"`validation_fraction` is {validation_fraction!r}; expected a number in [0, 1)."
        )
    if isinstance(seed, bool) or not isinstance(seed, int) or seed < 0:
        raise TrainingError(f"`seed` is {seed!r}; expected a non-negative integer.")
    return TrainingSettings(
        hidden=widths, activation=activation, rollout=_positive_int(rollout, "rollout"),
        epochs=_positive_int(epochs, "epochs"),
        batch_size=_positive_int(batch_size, "batch_size"), learning_rate=rate,
        validation_fraction=fraction,
        max_windows_per_epoch=None if max_windows_per_epoch is None
        else _positive_int(max_windows_per_epoch, "max_windows_per_epoch"),
        seed=seed, patience=None if patience is None else _positive_int(patience, "patience"),
        tolerance=_positive_number(tolerance, "tolerance"),
        horizon=None if horizon is None else _positive_number(horizon, "horizon"),
        keep_all_levels=_flag(keep_all_levels, "keep_all_levels"),
    )


def _positive_number(value: Any, where: str) -> float:
    number = float(value) if isinstance(value, int | float) else math.nan
    if isinstance(value, bool) or not math.isfinite(number) or number <= 0:
        raise TrainingError(f"`{where}` is {value!r}; expected a finite number > 0.")
    return number


def _check_horizon(horizon: float | None, base_step: float, finest: int) -> None:
    if horizon is not None and horizon < finest * base_step * (1 - 1e-9):
        raise TrainingError(
            f"`horizon` is {horizon!r}; expected at least the finest stride's time, "
            f"{finest * base_step!r}."
        )
