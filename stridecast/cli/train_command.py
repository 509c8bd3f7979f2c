"""`stridecast train`: its parser (every `train_levels` option, defaults in --help) and handler.

Option values are checked while parsing, so a malformed one ends in a one-line usage error
naming the option, the value and the expected form, never a traceback. Torch is imported only
when the command runs.
"""

from __future__ import annotations

import argparse
import json
import math

from .common import needs_extra
from .parsing import add_command

# The choices of `stridecast.export.networks.ACTIVATIONS` (kept equal by a test, so the parser
# need not import torch).
ACTIVATIONS = ("elu", "gelu", "leaky_relu", "mish", "relu", "sigmoid", "silu", "softplus", "tanh")
# Words that mean "no value" for options whose Python default may be None.
NONE_WORDS = ("none", "off", "all")


def _integers(option: str, example: str):
    def parse(text: str) -> tuple[int, ...]:
        parts = text.split(",")
        try:
            values = tuple(int(part.strip()) for part in parts)
        except ValueError:
            values = ()
        if not values or any(value <= 0 for value in values):
            raise argparse.ArgumentTypeError(
                f"`{option}` is {text!r}; expected comma-separated positive integers, "
                f"e.g. {example}.")
        return values

    return parse


def _number(option: str, *, low: float = 0.0, closed: bool = False, below: float | None = None,
            none: bool = False):
    """A float in (low, below) (or [low, below) when `closed`); a word of NONE_WORDS → None."""
    def parse(text: str) -> float | None:
        if none and text.strip().lower() in NONE_WORDS:
            return None
        try:
            value = float(text)
        except ValueError:
            value = math.nan
        fits = math.isfinite(value) and (value >= low if closed else value > low) and (
            below is None or value < below)
        if not fits:
            left = "[" if closed else "("
            right = f"{below:g})" if below is not None else "inf)"
            extra = " or none" if none else ""
            raise argparse.ArgumentTypeError(
                f"`{option}` is {text!r}; expected a number in {left}{low:g}, {right}{extra}.")
        return value

    return parse


def _count(option: str, *, none: bool = False, minimum: int = 1):
    """An integer ≥ `minimum`; a word of NONE_WORDS → None when `none`."""
    def parse(text: str) -> int | None:
        if none and text.strip().lower() in NONE_WORDS:
            return None
        try:
            value = int(text)
        except ValueError:
            value = minimum - 1
        if value < minimum:
            extra = f" or {'/'.join(NONE_WORDS)}" if none else ""
            raise argparse.ArgumentTypeError(
                f"`{option}` is {text!r}; expected an integer ≥ {minimum}{extra}.")
        return value

    return parse


def _reduce(text: str) -> int | float | None:
    """`--reduce`: a mode count (an integer ≥ 1), an energy fraction in (0, 1), or none."""
    word = text.strip().lower()
    if word in ("none", "off"):
        return None
    try:
        value: int | float = int(word)
    except ValueError:
        try:
            value = float(word)
        except ValueError:
            value = math.nan
    fits = value >= 1 if isinstance(value, int) else 0.0 < value < 1.0
    if not fits:
        raise argparse.ArgumentTypeError(
            f"`--reduce` is {text!r}; expected a number of modes (an integer ≥ 1, e.g. 8) or "
            "an energy fraction in (0, 1) (e.g. 0.999).")
    return value


def register(subparsers) -> None:
    train = add_command(subparsers, "train", "Train levels from trajectories and export a bundle.",
                "stridecast train data.npz --base-step 0.05 --strides 1,4,16,64 -o my.bundle",
                "stridecast.cli.train_command:train_command")
    data = train.add_argument_group("data")
    data.add_argument("data", help="trajectories: .npy (N, T, d) or (T, d); .npz (key "
                      "`trajectories`, or one array per trajectory); a folder of .npy files; "
                      ".h5/.hdf5; .nc; .zarr (lengths may differ; see docs/export.md)")
    data.add_argument("--base-step", type=_number("--base-step"), default=None,
                      help="time between samples (default: from the data file)")
    data.add_argument("--time-unit", default=None,
                      help="unit of --base-step, e.g. s (default: from the data file, else s)")
    data.add_argument("--validation-fraction", type=_number("--validation-fraction",
                                                            closed=True, below=1.0),
                      default=0.1, help="share of trajectories held out, in [0, 1); one "
                      "series is split in time (default: %(default)s)")
    levels = train.add_argument_group("levels")
    levels.add_argument("--strides", required=True, metavar="K1,K2,...",
                        type=_integers("--strides", "1,4,16,64"),
                        help="comma-separated strides in base steps, e.g. 1,4,16,64")
    levels.add_argument("--tolerance", type=_number("--tolerance"), default=0.1,
                        help="normalised RMS error up to which a horizon counts as validated "
                        "(default: %(default)s)")
    levels.add_argument("--horizon", type=_number("--horizon", none=True), default=None,
                        help="longest forecast time level selection optimises for, in time "
                        "units (default: the held-out length)")
    levels.add_argument("--keep-all-levels", action="store_true",
                        help="keep every trained level (default: keep the subset with the "
                        "lowest held-out error, always with the finest)")
    levels.add_argument("--reduce", type=_reduce, default=None, metavar="R",
                        help="for fields: step R latent coordinates of a POD basis fitted on "
                        "the training split (an integer number of modes below the state "
                        "dimension, or an energy fraction in (0, 1) such as 0.999: the "
                        "fewest modes keeping it); the bundle gets an encoder and decoder "
                        "(default: levels on the full state)")
    network = train.add_argument_group("networks and optimisation")
    network.add_argument("--hidden", default="128,128,128", metavar="W1,W2,...",
                         type=_integers("--hidden", "64,64"),
                         help="hidden layer widths (default: %(default)s)")
    network.add_argument("--activation", choices=ACTIVATIONS, default="tanh",
                         help="activation between layers, one of: " + ", ".join(ACTIVATIONS)
                         + " (default: %(default)s)")
    network.add_argument("--epochs", type=_count("--epochs"), default=50,
                         help="passes over the windows (default: %(default)s)")
    network.add_argument("--patience", type=_count("--patience", none=True), default=10,
                         help="stop a level after this many epochs without a better held-out "
                         "loss; the best epoch is restored ('none': never stop early) "
                         "(default: %(default)s)")
    network.add_argument("--rollout", type=_count("--rollout"), default=4,
                         help="steps of the multi-step loss (default: %(default)s)")
    network.add_argument("--batch-size", type=_count("--batch-size"), default=256,
                         help="windows per batch (default: %(default)s)")
    network.add_argument("--learning-rate", type=_number("--learning-rate"), default=1e-3,
                         help="Adam's initial rate, decaying on a cosine to 1%% of it "
                         "(default: %(default)s)")
    network.add_argument("--max-windows-per-epoch",
                         type=_count("--max-windows-per-epoch", none=True), default=65536,
                         help="windows one epoch visits, a fresh random subset each epoch "
                         "('all': every window) (default: %(default)s)")
    network.add_argument("--seed", type=_count("--seed", minimum=0), default=0,
                         help="seeds initialisation, the split and shuffling "
                         "(default: %(default)s)")
    network.add_argument("--threads", type=_count("--threads", none=True), default=1,
                         help="torch threads while training ('none': torch's own setting) "
                         "(default: %(default)s)")
    output = train.add_argument_group("output")
    output.add_argument("-o", "--out", required=True, help="bundle folder to write")
    output.add_argument("--name", default=None, help="bundle name (default: the folder name)")
    output.add_argument("--overwrite", action="store_true", help="replace an existing bundle")
    output.add_argument("--no-progress", action="store_true", help="no progress bars")


# Parser destination → train_levels keyword, for the options passed straight through.
TRAINING_OPTIONS = {
    "hidden": "hidden", "activation": "activation", "epochs": "epochs",
    "patience": "patience", "rollout": "rollout", "batch_size": "batch_size",
    "learning_rate": "learning_rate", "max_windows_per_epoch": "max_windows_per_epoch",
    "seed": "seed", "threads": "threads", "validation_fraction": "validation_fraction",
    "tolerance": "tolerance", "horizon": "horizon", "keep_all_levels": "keep_all_levels",
    "reduce": "reduce",
}


def train_command(arguments: argparse.Namespace) -> int:
    with needs_extra("export"):
        from stridecast.export.cli_support import train_from_file, training_summary
    training = {keyword: getattr(arguments, name) for name, keyword in TRAINING_OPTIONS.items()}
    path, trained = train_from_file(
        arguments.data, arguments.out, strides=arguments.strides,
        base_step=arguments.base_step, time_unit=arguments.time_unit, name=arguments.name,
        overwrite=arguments.overwrite, progress=not arguments.no_progress, **training)
    print(f"trained {len(trained.history)} levels and wrote the verified bundle {path}")
    manifest = json.loads((path / "manifest.json").read_text(encoding="utf-8"))
    for line in training_summary(trained, time_unit=manifest["time"].get("unit", "")):
        print(line)
    print(f"inspect it with: stridecast inspect {path}")
    return 0
