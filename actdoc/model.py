"""Domain types: a dump, its layers, and lazy access to their arrays.

Readers (``actdoc.io``) build these objects; the engine (``actdoc.analysis``) consumes them.
A layer never loads an activation array whole: it hands out blocks of observations as
``[block, units]`` float arrays. Spatial layouts ``[samples, channels, *spatial]`` become
``[observations, channels]``: each channel is one unit and each spatial position of each sample is
one observation of it. Weights and biases are small next to activations and come whole.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from enum import Enum
from pathlib import Path
from typing import Callable, Iterator, Mapping, Protocol

import numpy as np

from actdoc.errors import UnknownActivation

#: Observations per block handed to the engine. 16384 rows of 256 float32 units is 16 MiB.
DEFAULT_BLOCK_OBSERVATIONS = 4096

ACTIVATION_ARRAYS = ("preact", "output")
PARAMETER_ARRAYS = ("weight", "bias")
#: Optional dL/dz on the probe batch, the shape of preact (docs/dump-layout.md, an extension).
GRADIENT_ARRAY = "grad"
LAYER_ARRAYS = ACTIVATION_ARRAYS + PARAMETER_ARRAYS + (GRADIENT_ARRAY,)


class ActivationKind(str, Enum):
    """The transfer functions actdoc knows (docs/contract.md section 1)."""

    LINEAR = "linear"
    THRESHOLD = "threshold"
    RELU = "relu"
    LEAKY_RELU = "leaky_relu"
    LOGISTIC = "logistic"
    TANH = "tanh"
    STOCHASTIC_BINARY = "stochastic_binary"
    SOFTPLUS = "softplus"
    GELU = "gelu"
    SILU = "silu"

    @classmethod
    def parse(cls, text: str, where: str = "") -> "ActivationKind":
        """Read a kind name, case-insensitively, accepting the documented aliases."""
        key = str(text).strip().lower().replace("-", "_")
        key = KIND_ALIASES.get(key, key)
        try:
            return cls(key)
        except ValueError:
            accepted = ", ".join(k.value for k in cls)
            aliases = ", ".join(f"{a} ({k})" for a, k in KIND_ALIASES.items())
            prefix = f"{where}: " if where else ""
            raise UnknownActivation(
                f"{prefix}unknown activation '{text}'; accepted kinds are {accepted}; "
                f"aliases {aliases}"
            ) from None

    def __str__(self) -> str:
        return self.value


KIND_ALIASES: dict[str, str] = {
    "identity": "linear",
    "step": "threshold",
    "heaviside": "threshold",
    "binary": "threshold",
    "sigmoid": "logistic",
    "swish": "silu",
}

#: Kinds whose units can be silent (the "dead" check applies).
SILENCEABLE_KINDS = frozenset(
    {ActivationKind.RELU, ActivationKind.LEAKY_RELU, ActivationKind.THRESHOLD,
     ActivationKind.STOCHASTIC_BINARY}
)
#: Rectified kinds (the "dormant" check applies).
RECTIFIED_KINDS = frozenset({ActivationKind.RELU, ActivationKind.LEAKY_RELU})
#: Bounded squashing kinds (saturation, near-binary and linear-regime checks apply).
SQUASHING_KINDS = frozenset({ActivationKind.LOGISTIC, ActivationKind.TANH})


class ActivationSource(str, Enum):
    """Whether a layer's kind was written in the dump or worked out from its arrays."""

    DECLARED = "declared"
    INFERRED = "inferred"

    def __str__(self) -> str:
        return self.value


@dataclass(frozen=True)
class ArrayInfo:
    """Shape and stored dtype of one array of a layer."""

    shape: tuple[int, ...]
    dtype: str


class ArraySource(Protocol):
    """What a reader hands the model for one stored array (the reader contract's array half).

    ``read_samples`` returns the rows ``start:stop`` of the first axis in the stored layout and
    dtype; it may fill and return ``out`` when given a buffer of the right shape and dtype.
    ``read_unit`` returns ``array[:, unit, ...]`` (all samples of one unit or channel).
    """

    shape: tuple[int, ...]
    dtype: np.dtype

    def read_samples(self, start: int, stop: int, out: np.ndarray | None = None) -> np.ndarray: ...

    def read_unit(self, unit: int) -> np.ndarray: ...

    def read_all(self) -> np.ndarray: ...


@dataclass(frozen=True)
class LayerInfo:
    """Everything known about a layer without reading its activations."""

    name: str
    index: int
    kind: ActivationKind
    kind_source: ActivationSource
    units: int
    samples: int
    spatial_shape: tuple[int, ...]
    arrays: Mapping[str, ArrayInfo]
    negative_slope: float = 0.01
    threshold: float = 0.0
    kind_note: str = ""
    #: preact equals output exactly and is never negative on the first block: z was probably
    #: recorded after an in-place activation overwrote it (docs/dump-layout.md).
    in_place_suspect: bool = False

    @property
    def observations(self) -> int:
        """Observations per unit: samples times spatial positions."""
        return self.samples * math.prod(self.spatial_shape)

    @property
    def positions(self) -> int:
        """Spatial positions per sample (1 for dense layers)."""
        return math.prod(self.spatial_shape)

    def has(self, array: str) -> bool:
        return array in self.arrays


def to_observations(raw: np.ndarray) -> np.ndarray:
    """``[samples, units, *spatial]`` to ``[observations, units]`` (channels-first input)."""
    if raw.ndim == 2:
        return raw
    moved = np.moveaxis(raw, 1, -1)
    return moved.reshape(-1, raw.shape[1])


def as_float(block: np.ndarray) -> np.ndarray:
    """Engine-ready values: float64 stays float64, every other dtype becomes float32."""
    if block.dtype == np.float64 or block.dtype == np.float32:
        return block
    return block.astype(np.float32)


@dataclass(frozen=True)
class Layer:
    """A layer with lazy access to its arrays. ``sources`` maps array name to its source."""

    info: LayerInfo
    sources: Mapping[str, ArraySource] = field(repr=False)

    @property
    def name(self) -> str:
        return self.info.name

    def blocks(
        self, array: str, block_observations: int = DEFAULT_BLOCK_OBSERVATIONS
    ) -> Iterator[np.ndarray]:
        """Yield ``[block, units]`` float blocks of ``array`` ("preact" or "output") in order."""
        for pair in self.paired_blocks(block_observations, arrays=(array,)):
            yield pair[0]

    def paired_blocks(
        self,
        block_observations: int = DEFAULT_BLOCK_OBSERVATIONS,
        arrays: tuple[str, ...] = ACTIVATION_ARRAYS,
        start_sample: int = 0,
        stop_sample: int | None = None,
    ) -> Iterator[tuple[np.ndarray | None, ...]]:
        """Yield aligned blocks of several activation arrays (None where an array is absent).

        Each array is read once, front to back, one block of samples at a time, reusing one
        buffer per array so a pass keeps flat memory.
        """
        stop = self.info.samples if stop_sample is None else min(stop_sample, self.info.samples)
        step = max(1, block_observations // max(1, self.info.positions))
        buffers: dict[str, np.ndarray] = {}
        for first in range(start_sample, stop, step):
            last = min(stop, first + step)
            out = []
            for name in arrays:
                source = self.sources.get(name)
                if source is None:
                    out.append(None)
                    continue
                # The last, shorter block reuses the first rows of the buffer: a new one would
                # be allocated while the caller still holds views of the previous block.
                buf = buffers.get(name)
                if buf is None or buf.shape[0] < last - first:
                    buf = np.empty((last - first,) + tuple(source.shape[1:]), source.dtype)
                    buffers[name] = buf
                raw = source.read_samples(first, last, out=buf[:last - first])
                out.append(as_float(to_observations(raw)))
            yield tuple(out)

    def unit_values(self, array: str, unit: int) -> np.ndarray:
        """All observations of one unit (or channel) of ``array``, as a 1-D float array."""
        source = self.sources[array]
        return as_float(np.ascontiguousarray(source.read_unit(unit)).reshape(-1))

    def weight(self) -> np.ndarray | None:
        """Incoming weights as ``[units, fan_in]`` (kernels flattened), or None."""
        source = self.sources.get("weight")
        if source is None:
            return None
        w = source.read_all()
        return as_float(w.reshape(w.shape[0], -1))

    def bias(self) -> np.ndarray | None:
        """Biases as ``[units]``, or None. A threshold unit's bias is minus its threshold."""
        source = self.sources.get("bias")
        if source is None:
            return None
        return as_float(source.read_all().reshape(-1))

    @property
    def fan_in(self) -> int | None:
        """Inputs per unit: in_channels times kernel size for convolutions."""
        shape = self.info.arrays.get("weight")
        return None if shape is None else math.prod(shape.shape[1:])

    @property
    def fan_out(self) -> int | None:
        """Outputs each input feeds: units times kernel size (the Glorot convention)."""
        shape = self.info.arrays.get("weight")
        if shape is None:
            return None
        return shape.shape[0] * math.prod(shape.shape[2:])


@dataclass(frozen=True)
class Dump:
    """A readable dump: its layers in forward order and where it came from."""

    path: Path
    format: str
    layers: tuple[Layer, ...]
    samples: int
    probe_input: ArraySource | None = field(default=None, repr=False)
    closer: Callable[[], None] | None = field(default=None, repr=False, compare=False)

    def layer(self, name: str) -> Layer:
        for layer in self.layers:
            if layer.name == name:
                return layer
        raise KeyError(name)

    def close(self) -> None:
        if self.closer is not None:
            self.closer()

    def __enter__(self) -> "Dump":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


# ---------------------------------------------------------------------------------------------
# What the engine concludes. Reports and the dashboard read these; only the engine builds them.
# ---------------------------------------------------------------------------------------------

#: Shown wherever a user reads findings (reports, pages, terminal).
CAVEAT = (
    "These findings are advice about this model, not proof: they hold only for the probe batch "
    "they were computed on. For them to speak for the model, the probe batch must be drawn from "
    "the data the model sees in use (held out, preprocessed exactly as in training, large enough "
    "that every unit had the chance to fire: a few thousand samples is a good start)."
)


class Severity(str, Enum):
    """How urgent a finding is. Compare with ``rank``."""

    INFO = "info"
    WARNING = "warning"
    CRITICAL = "critical"

    @property
    def rank(self) -> int:
        return {"info": 0, "warning": 1, "critical": 2}[self.value]

    def __str__(self) -> str:
        return self.value


class LayerStatus(str, Enum):
    """A layer's verdict: the worst severity among its findings (info counts as healthy)."""

    HEALTHY = "healthy"
    WARNING = "warning"
    CRITICAL = "critical"

    def __str__(self) -> str:
        return self.value


@dataclass(frozen=True)
class Finding:
    """One check's verdict on one layer: which units, how far past the limit, and what to do."""

    check: str
    severity: Severity
    layer: str
    units: tuple[int, ...]
    measure: float
    threshold: float
    summary: str
    cause: str
    remedy: str
    #: Per-unit value of the measure, aligned with ``units`` (e.g. each unit's active share);
    #: empty for layer-level checks.
    unit_measures: tuple[float, ...] = ()
    #: The other checks that named the same layer, so a reader sees findings that explain each
    #: other together (docs/findings.md).
    related: tuple[str, ...] = ()


#: The ``layer`` of findings about the probe batch itself (they name no layer of the network).
PROBE_LAYER = "probe/input"


@dataclass(frozen=True)
class ProbeReport:
    """What the probe batch itself looks like: its size, its features' scale, bad rows.

    ``feature_mean`` and ``feature_std`` are per feature (NaN without a stored probe input).
    """

    samples: int
    features: int
    feature_mean: np.ndarray = field(repr=False)
    feature_std: np.ndarray = field(repr=False)
    nonfinite_rows: int
    stored: bool


@dataclass(frozen=True)
class Histogram:
    """Counts of ``quantity`` ("preact" or "output") between fixed ``edges``."""

    quantity: str
    edges: np.ndarray
    counts: np.ndarray


@dataclass(frozen=True)
class WeightSummary:
    """Incoming weights of a layer against the reference scale for its kind."""

    fan_in: int
    fan_out: int
    std: float
    reference_std: float
    reference: str
    row_norms: np.ndarray
    bias: np.ndarray | None


@dataclass(frozen=True)
class LayerReport:
    """A layer's measured health.

    ``unit_table`` holds one array per column, each of length ``info.units`` (for example
    "mean", "std", "active_fraction", "low_fraction", "high_fraction", "linear_fraction",
    "bimodality", "dormant_score", and "state", the unit check that names the unit or "").
    """

    info: LayerInfo
    fractions: Mapping[str, float]
    status: LayerStatus
    output_scale: float | None
    gradient_gain: float | None
    unit_table: Mapping[str, np.ndarray] = field(repr=False)
    histograms: Mapping[str, Histogram] = field(repr=False)
    weights: WeightSummary | None = field(default=None, repr=False)

    @property
    def name(self) -> str:
        return self.info.name


@dataclass(frozen=True)
class SourceInfo:
    """The dump the findings were computed from."""

    file: str
    sha256: str
    format: str
    samples: int


@dataclass(frozen=True)
class Findings:
    """The whole result of one analysis: per-layer reports and the findings, in forward order."""

    source: SourceInfo
    layers: tuple[LayerReport, ...]
    findings: tuple[Finding, ...]
    settings: Mapping[str, float] = field(default_factory=dict)
    caveat: str = CAVEAT
    probe: ProbeReport | None = None

    def layer(self, name: str) -> LayerReport:
        for report in self.layers:
            if report.name == name:
                return report
        raise KeyError(name)

    def for_layer(self, name: str) -> tuple[Finding, ...]:
        return tuple(f for f in self.findings if f.layer == name)

    def worst(self) -> Severity | None:
        """The highest severity among the findings, or None when there are none."""
        if not self.findings:
            return None
        return max((f.severity for f in self.findings), key=lambda s: s.rank)
