"""Benchmark dumps of a chosen size, written with actdoc's own writer and cached by name.

A benchmark dump has several float32 layers of mixed kinds (relu, logistic, tanh, relu), each
storing preact and output, with a few planted pathologies (silent relu units, saturated
logistic units) so the analysis has something to find. Values are synthetic: the benchmark
measures throughput and memory, not findings.

Generation is cheap: one pool of normal noise is drawn once and every block is an affine
transform of a slice of it, so writing is bound by the disk, not the random number generator.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import h5py
import numpy as np

from actdoc.io.writer import DumpWriter
from actdoc.neurons import logistic

LAYER_KINDS = ("relu", "logistic", "tanh", "relu")
UNITS = 1024
BLOCK_ROWS = 4096
POOL_BLOCKS = 3
#: Bump when the generated content changes, so stale cached files are not reused.
GENERATOR_VERSION = 1


@dataclass(frozen=True)
class BenchDump:
    """A cached benchmark dump and what it holds."""

    path: Path
    samples: int
    layers: int
    units: int

    @property
    def activation_bytes(self) -> int:
        """Bytes of preact and output over all layers (float32)."""
        return self.layers * 2 * self.samples * self.units * 4


def samples_for(size_gb: float, layers: int = len(LAYER_KINDS), units: int = UNITS) -> int:
    """Samples per layer so the activations total about ``size_gb`` (1 GB = 1e9 bytes)."""
    per_array = size_gb * 1e9 / (layers * 2)
    return max(8, int(round(per_array / (units * 4))))


def output_of(kind: str, z: np.ndarray) -> np.ndarray:
    """y = f(z) for the benchmark layers' kinds."""
    if kind == "relu":
        return np.maximum(z, 0.0)
    if kind == "logistic":
        return logistic(z)
    return np.tanh(z)


def unit_offsets(kind: str, units: int, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """Per-unit scale and shift of the total input, with a few planted pathologies."""
    scale = rng.uniform(0.5, 2.0, units).astype(np.float32)
    shift = rng.normal(0.0, 0.5, units).astype(np.float32)
    planted = max(1, units // 32)
    if kind == "relu":
        shift[:planted] = -20.0  # silent: never positive
    elif kind == "logistic":
        shift[:planted] = 12.0  # saturated high
    return scale, shift


def write_bench_dump(path: Path, samples: int, units: int = UNITS,
                     kinds: tuple[str, ...] = LAYER_KINDS, seed: int = 0) -> None:
    """Write the dump with DumpWriter.append, block by block (flat memory)."""
    rng = np.random.default_rng(seed)
    rows = min(BLOCK_ROWS, samples)
    pool = rng.standard_normal((POOL_BLOCKS, rows, units), dtype=np.float32)
    with DumpWriter(path, overwrite=True) as out:
        for index, kind in enumerate(kinds):
            fan_in = units
            weight = rng.normal(0.0, 1.0 / np.sqrt(fan_in), (units, fan_in)).astype(np.float32)
            out.add_layer(f"layer{index + 1}", kind, units=units, weight=weight,
                          bias=np.zeros(units, np.float32))
            scale, shift = unit_offsets(kind, units, rng)
            for block, first in enumerate(range(0, samples, rows)):
                count = min(rows, samples - first)
                z = pool[block % POOL_BLOCKS, :count] * scale + (shift + 0.01 * block)
                out.append(f"layer{index + 1}", preact=z, output=output_of(kind, z))


def cached_file_ok(path: Path, samples: int, units: int, layers: int) -> bool:
    """Whether ``path`` is a finished benchmark dump of exactly this geometry."""
    try:
        with h5py.File(path, "r") as handle:
            groups = list(handle["layers"].values())
            return (handle.attrs.get("bench_version") == GENERATOR_VERSION
                    and len(groups) == layers
                    and all(g["preact"].shape == (samples, units) for g in groups))
    except (OSError, KeyError):
        return False


def ensure_bench_dump(cache: Path, size_gb: float, units: int = UNITS) -> BenchDump:
    """The cached dump for ``size_gb``, written first if missing or of the wrong geometry."""
    cache.mkdir(parents=True, exist_ok=True)
    layers = len(LAYER_KINDS)
    samples = samples_for(size_gb, layers, units)
    path = cache / f"bench-{samples}x{units}x{layers}-v{GENERATOR_VERSION}.h5"
    if not cached_file_ok(path, samples, units, layers):
        write_bench_dump(path, samples, units)
        with h5py.File(path, "r+") as handle:
            handle.attrs["bench_version"] = GENERATOR_VERSION
    return BenchDump(path=path, samples=samples, layers=layers, units=units)
