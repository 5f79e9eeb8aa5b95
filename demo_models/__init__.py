"""Demo networks: small MLPs trained by actdoc's own numpy code on an invented greenhouse task.

Each demo is a real training run, set up the way a pathology arises in practice, beside a
healthy baseline. The dumps ship in ``DUMPS_DIR`` (regenerate them with
``demo_models.generate.write_all`` or ``actdoc demo --output DIR``); ``DEMOS`` describes them
for the dashboard and the docs (docs/demo.md).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

#: The committed demo dumps, one HDF5 file per snapshot.
DUMPS_DIR = Path(__file__).resolve().parent / "dumps"


@dataclass(frozen=True)
class Demo:
    """One demo: ``name`` (the file stem, or the stem prefix of a checkpoint series), a short
    ``title``, a paragraph saying what it shows, and the file names it consists of."""

    name: str
    title: str
    description: str
    files: tuple[str, ...]


DEMOS: tuple[Demo, ...] = (
    Demo(
        "healthy_baseline",
        "Healthy baseline",
        "Two rectified hidden layers of 64 units with He initialisation, trained on "
        "standardised sensor readings by Adam at its usual rate of 1e-3 for 20 epochs. Every "
        "unit fires on a healthy share of the probe rows; this is what the other demos should "
        "look like.",
        ("healthy_baseline.h5",),
    ),
    Demo(
        "relu_high_rate",
        "Rectified units killed by a high learning rate",
        "The baseline's network and data, trained by Adam at 3e-2, thirty times the usual "
        "rate. Early oversized steps drive the total input of many second-layer units below "
        "zero for every input; such a unit gets no gradient and never recovers. About 60% of "
        "that layer is dead, although the network still classifies reasonably with the rest.",
        ("relu_high_rate.h5",),
    ),
    Demo(
        "relu_dying",
        "Units dying step by step (five checkpoints)",
        "One run of the baseline's network whose learning-rate warm-up never stops: the rate "
        "grows by 25% each epoch from 1e-3. Checkpoints after epochs 12, 15, 18, 20 and 22 "
        "show the dead share of the second layer climbing from one unit to about half the "
        "layer as the rate passes 1e-2.",
        tuple(f"relu_dying_step{i}.h5" for i in range(1, 6)),
    ),
    Demo(
        "logistic_deep_old_init",
        "Deep logistic network: the top hidden layer saturates",
        "Four logistic hidden layers of 64 units initialised with the old standard "
        "U[-1/sqrt(n), 1/sqrt(n)] and trained by plain SGD. As Glorot and Bengio (2010) "
        "reported, the top hidden layer is driven to 0 early in training while the lower "
        "layers stay near 0.5 (and in their near-linear zone): the dump is taken on the "
        "plateau, where the network still predicts only the most common vent position.",
        ("logistic_deep_old_init.h5",),
    ),
    Demo(
        "logistic_near_binary",
        "Logistic units turned into on/off switches by growing weights",
        "One logistic hidden layer trained for 120 epochs by Adam at 0.3 with no weight decay. "
        "Nothing holds the weights back; they grow about sixty-fold past the Glorot scale, the "
        "total inputs leave the curved zone, and most units end up either pinned at 0 or 1 or "
        "flipping between the two like binary threshold units.",
        ("logistic_near_binary.h5",),
    ),
    Demo(
        "tanh_raw_inputs",
        "Tanh units saturated by unstandardised inputs",
        "Two tanh hidden layers with Glorot initialisation, trained like the baseline but on "
        "the raw sensor units (pascals, lux, ppm). The first layer's total inputs are in the "
        "thousands, so most of its units sit at +1 or -1 for every input and pass no gradient; "
        "the rest flip between the two like switches. Probe accuracy is 60%, against 91% for "
        "the baseline on standardised inputs.",
        ("tanh_raw_inputs.h5",),
    ),
)


def bundled_dumps() -> list[Path]:
    """The committed demo dumps, sorted by file name."""
    return sorted(DUMPS_DIR.glob("*.h5"))
