"""Train every demo network and write its dump: ``write_all(output_dir) -> list[Path]``.

Each recipe below is one training run on the greenhouse scenario (``demo_models.scenario``),
set up the way the pathology it shows arises in practice, with its own fixed seeds so that every
run is deterministic and independent of the others. The networks train in float64; the dumps
hold float32 arrays recorded on held-out probe rows, as a user would record them.
"""

from __future__ import annotations

import contextlib
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np

from demo_models.scenario import Split, make_split
from demo_models.trainer import MLP, SGD, Adam, train

TRAIN_ROWS = 4000
PROBE_ROWS = 512
#: Seed of the simulated sensor log every demo trains on (the same log for all of them).
DATA_SEED = 7

RELU_SIZES = (7, 64, 64, 3)
CHECKPOINT_EPOCHS = (12, 15, 18, 20, 22)


@dataclass(frozen=True)
class Snapshot:
    """One dump to write: its file stem, layer mapping for ``write_dump`` and probe inputs."""

    name: str
    layers: dict
    probe_input: np.ndarray


def snapshot(name: str, model: MLP, data: Split) -> Snapshot:
    """Record ``model`` on the probe rows, in float32 as the dumps store it."""
    return Snapshot(name, model.dump_layers(data.probe_x), data.probe_x.astype(np.float32))


def relu_network(seed: int) -> tuple[MLP, np.random.Generator]:
    """The rectified architecture every ReLU demo shares, He-initialised, and its generator."""
    rng = np.random.default_rng(seed)
    kinds = ["relu"] * (len(RELU_SIZES) - 2) + ["linear"]
    return MLP(RELU_SIZES, kinds, rng=rng, init="he_normal"), rng


def healthy_baseline(data: Split) -> list[Snapshot]:
    """He initialisation, rectified units, standardised inputs, Adam at its usual 1e-3."""
    model, rng = relu_network(seed=0)
    train(model, Adam(1e-3), data.train_x, data.train_labels, rng=rng, epochs=20, batch_size=64)
    return [snapshot("healthy_baseline", model, data)]


def relu_high_rate(data: Split) -> list[Snapshot]:
    """The same network and data with Adam at 3e-2, thirty times the usual rate.

    Large early steps push many units' total input below zero for every input; a unit in that
    state gets no gradient and never comes back.
    """
    model, rng = relu_network(seed=0)
    train(model, Adam(3e-2), data.train_x, data.train_labels, rng=rng, epochs=10, batch_size=64)
    return [snapshot("relu_high_rate", model, data)]


def relu_dying_series(data: Split) -> list[Snapshot]:
    """One run whose learning-rate warm-up never stops: the rate grows 25% per epoch from 1e-3.

    A checkpoint is written after each epoch of ``CHECKPOINT_EPOCHS``; as the rate climbs past
    about 1e-2, units die a few at a time, so the series shows the dead share rising.
    """
    model, rng = relu_network(seed=0)
    optimizer = Adam(1e-3)
    shots: list[Snapshot] = []

    def keep_checkpoint(epoch: int, trained: MLP) -> None:
        if epoch + 1 in CHECKPOINT_EPOCHS:
            step = CHECKPOINT_EPOCHS.index(epoch + 1) + 1
            shots.append(snapshot(f"relu_dying_step{step}", trained, data))

    train(model, optimizer, data.train_x, data.train_labels, rng=rng,
          epochs=max(CHECKPOINT_EPOCHS), batch_size=64,
          schedule=lambda epoch: 1e-3 * 1.25 ** epoch, after_epoch=keep_checkpoint)
    return shots


def logistic_deep_old_init(data: Split) -> list[Snapshot]:
    """Four logistic hidden layers, U[-1/sqrt(n), 1/sqrt(n)] weights, plain SGD at rate 2.

    As Glorot and Bengio (2010, Figure 2) observed, the top hidden layer is driven to 0 early in
    training while the lower layers stay near 0.5, and training sits on a plateau where the
    network only predicts the most common class. The dump is taken on that plateau, after four
    epochs.
    """
    rng = np.random.default_rng(1)
    model = MLP((7, 64, 64, 64, 64, 3), ["logistic"] * 4 + ["linear"], rng=rng, init="old_uniform")
    train(model, SGD(2.0), data.train_x, data.train_labels, rng=rng, epochs=4, batch_size=32)
    return [snapshot("logistic_deep_old_init", model, data)]


def logistic_near_binary(data: Split) -> list[Snapshot]:
    """One logistic hidden layer trained long (120 epochs) by Adam at 0.3, no weight decay.

    Nothing holds the weights back, so they keep growing; the total inputs spread far beyond
    the logistic's curved zone and units end up pinned at 0 or 1 or flipping between the two.
    """
    rng = np.random.default_rng(0)
    model = MLP((7, 32, 3), ["logistic", "linear"], rng=rng, init="glorot_uniform")
    train(model, Adam(0.3), data.train_x, data.train_labels, rng=rng, epochs=120, batch_size=64)
    return [snapshot("logistic_near_binary", model, data)]


def tanh_raw_inputs(raw: Split) -> list[Snapshot]:
    """Two tanh hidden layers, Glorot initialisation and Adam at 1e-3, on unstandardised inputs.

    The sensors report in pascals, lux and ppm, so the first layer's total inputs are in the
    thousands: its units sit at +1 or -1 from the first step, pass no gradient, and the layer
    above sees nearly constant inputs.
    """
    rng = np.random.default_rng(0)
    model = MLP((7, 32, 32, 3), ["tanh", "tanh", "linear"], rng=rng, init="glorot_uniform")
    train(model, Adam(1e-3), raw.train_x, raw.train_labels, rng=rng, epochs=20, batch_size=64)
    return [snapshot("tanh_raw_inputs", model, raw)]


#: Recipes on standardised inputs, then those on raw sensor units.
STANDARDISED_RECIPES: tuple[Callable[[Split], list[Snapshot]], ...] = (
    healthy_baseline, relu_high_rate, relu_dying_series, logistic_deep_old_init,
    logistic_near_binary,
)
RAW_RECIPES: tuple[Callable[[Split], list[Snapshot]], ...] = (tanh_raw_inputs,)


def single_threaded_blas() -> contextlib.AbstractContextManager:
    """One BLAS thread while training: these matrices are so small that more threads only add
    overhead (three times slower on a busy two-core machine). Results are the same either way.
    Uses threadpoolctl where installed (it comes with scikit-learn), else changes nothing."""
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:
        return contextlib.nullcontext()
    return threadpool_limits(limits=1, user_api="blas")


def snapshots() -> list[Snapshot]:
    """Train every demo and return its snapshots (nothing written)."""
    standardised = make_split(TRAIN_ROWS, PROBE_ROWS, DATA_SEED, standardise=True)
    raw = make_split(TRAIN_ROWS, PROBE_ROWS, DATA_SEED, standardise=False)
    shots: list[Snapshot] = []
    with single_threaded_blas():
        for recipe in STANDARDISED_RECIPES:
            shots.extend(recipe(standardised))
        for recipe in RAW_RECIPES:
            shots.extend(recipe(raw))
    return shots


def write_all(output_dir: str | Path) -> list[Path]:
    """Train every demo network and write one HDF5 dump per snapshot into ``output_dir``.

    The folder is created if needed; demo files already there are replaced (they are
    regenerated identically). Returns the written paths, sorted by name.
    """
    from actdoc.io.writer import write_dump

    folder = Path(output_dir)
    folder.mkdir(parents=True, exist_ok=True)
    paths = [
        write_dump(folder / f"{shot.name}.h5", shot.layers, shot.probe_input, overwrite=True)
        for shot in snapshots()
    ]
    return sorted(paths)
