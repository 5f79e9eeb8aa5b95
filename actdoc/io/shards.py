"""Sharded dumps: one model's recordings split over several files by samples.

A shard is an ordinary dump (HDF5 or NPZ) holding every layer of the model but only a slice of
the probe samples. Together the shards stand for the dump their samples would make if they were
concatenated in shard order. A sharded dump is named by a folder (every dump file directly in
it) or by a glob pattern; shards are taken in natural name order ("part2" before "part10").

Shards must agree on everything except their sample count: the same layers in the same order,
with the same kinds, units, spatial shapes, stored arrays and the same weights and biases.
``open_shards`` checks this once, up front, and names the first shard that disagrees.
"""

from __future__ import annotations

import glob
import hashlib
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Sequence

from actdoc.errors import InvalidDump, UnreadableDump, describe
from actdoc.io.base import natural_key
from actdoc.model import ArrayInfo, Dump, Layer, LayerInfo

#: File name endings taken from a folder of shards.
SHARD_SUFFIXES = (".h5", ".hdf5", ".hdf", ".npz")


@dataclass(frozen=True)
class ShardLayout:
    """What every shard of a sharded dump shares, plus the concatenated sample count.

    ``layers`` are the first shard's layer descriptions with ``samples`` (and the sample axis of
    each activation array) replaced by the total over all shards. ``shard_samples`` lists each
    shard's own sample count, in shard order; ``layer_samples[shard][layer]`` each layer's in
    each shard (layers of one dump may hold different sample counts).
    """

    paths: tuple[Path, ...]
    layers: tuple[LayerInfo, ...]
    shard_samples: tuple[int, ...]
    layer_samples: tuple[tuple[int, ...], ...]
    format: str

    @property
    def samples(self) -> int:
        return sum(self.shard_samples)


def _has_glob(text: str) -> bool:
    return any(ch in text for ch in "*?[")


def is_sharded(spec: str | Path) -> bool:
    """Whether a command-line DUMP argument names shards (a folder or a glob pattern)."""
    return Path(spec).is_dir() or (_has_glob(str(spec)) and not Path(spec).exists())


def find_shards(spec: str | Path | Sequence[str | Path]) -> list[Path]:
    """The shard files a spec names: a folder or a glob pattern (in natural name order), or an
    explicit list of files (in the order given). Hidden files in a folder are skipped."""
    given_order = not isinstance(spec, (str, Path)) or not (
        Path(spec).is_dir() or _has_glob(str(spec)))
    if not isinstance(spec, (str, Path)):
        paths = [Path(p) for p in spec]
        if not paths:
            raise UnreadableDump("the list of shard files is empty")
    elif Path(spec).is_dir():
        folder = Path(spec)
        paths = [p for p in folder.iterdir() if p.is_file() and not p.name.startswith(".")
                 and p.suffix.lower() in SHARD_SUFFIXES]
        if not paths:
            raise UnreadableDump(
                f"{folder}: the folder holds no dump files "
                f"(looked for names ending in {', '.join(SHARD_SUFFIXES)})")
    elif _has_glob(str(spec)):
        paths = [Path(p) for p in glob.glob(str(spec)) if Path(p).is_file()]
        if not paths:
            raise UnreadableDump(f"no shard files match the pattern '{spec}'")
    else:
        paths = [Path(spec)]
    for path in paths:
        if not path.is_file():
            raise UnreadableDump(f"{path}: no such shard file")
    return paths if given_order else sorted(paths, key=lambda p: natural_key(p.name))


def _parameter_digest(dump: Dump, layer_name: str) -> str:
    """A hash of a layer's weight and bias values (small arrays, read whole)."""
    layer = dump.layer(layer_name)
    digest = hashlib.sha256()
    for array in (layer.weight(), layer.bias()):
        if array is not None:
            digest.update(array.tobytes())
    return digest.hexdigest()


def _mismatch(shard: Path, first: Path, layer: str | None, what: str, odd: object,
              expected: object) -> InvalidDump:
    return InvalidDump(
        f"{describe(shard, layer)}: {what} is {odd} where the first shard "
        f"{first.name} has {expected}; every shard must hold the same layers and parameters")


def _compare(reference: Dump, shard: Dump) -> None:
    """Raise InvalidDump naming ``shard`` where it differs from ``reference`` beyond samples."""
    first, path = reference.path, shard.path
    names = [layer.name for layer in reference.layers]
    found = [layer.name for layer in shard.layers]
    if names != found:
        raise _mismatch(path, first, None, "the layer list", found, names)
    for ref_layer, layer in zip(reference.layers, shard.layers):
        ref, info = ref_layer.info, layer.info
        for what, odd, expected in (
            ("the activation kind", info.kind.value, ref.kind.value),
            ("the unit count", info.units, ref.units),
            ("the spatial shape", list(info.spatial_shape), list(ref.spatial_shape)),
            ("the set of stored arrays", sorted(info.arrays), sorted(ref.arrays)),
        ):
            if odd != expected:
                raise _mismatch(path, first, info.name, what, odd, expected)
        for array in ("weight", "bias"):
            if array in ref.arrays and info.arrays[array].shape != ref.arrays[array].shape:
                raise _mismatch(path, first, info.name, f"the shape of '{array}'",
                                list(info.arrays[array].shape), list(ref.arrays[array].shape))
        if _parameter_digest(shard, info.name) != _parameter_digest(reference, info.name):
            raise InvalidDump(
                f"{describe(path, info.name)}: its weights or biases differ from those in the "
                f"first shard {first.name}; shards must come from the same model")


def _with_samples(info: LayerInfo, samples: int) -> LayerInfo:
    """``info`` with the sample count (and the activation arrays' first axis) set to ``samples``.

    Weights-only layers keep zero samples: they have no activation arrays to add up.
    """
    arrays = {
        name: ArrayInfo((samples,) + tuple(shape.shape[1:]), shape.dtype)
        if name in ("preact", "output", "grad") else shape
        for name, shape in info.arrays.items()
    }
    return replace(info, samples=samples, arrays=arrays)


def open_shards(spec: str | Path | Sequence[str | Path], **open_options) -> list[Path]:
    """The validated shard files of a sharded dump, in shard order.

    ``spec`` is a folder, a glob pattern, a single file or a list of files. Every shard is
    opened (layer descriptions and parameters only) and compared with the first; the first
    disagreement raises InvalidDump in one sentence naming the odd shard, its layer and what
    differs. ``open_options`` go to ``actdoc.io.open_dump`` (e.g. ``activations``).
    """
    return list(shard_layout(spec, **open_options).paths)


def shard_layout(spec: str | Path | Sequence[str | Path], **open_options) -> ShardLayout:
    """Validate the shards like ``open_shards`` and describe the dump they make together."""
    from actdoc.io import open_dump

    paths = find_shards(spec)
    with open_dump(paths[0], **open_options) as reference:
        per_shard = [tuple(layer.info.samples for layer in reference.layers)]
        counts = [reference.samples]
        for path in paths[1:]:
            with open_dump(path, **open_options) as shard:
                _compare(reference, shard)
                counts.append(shard.samples)
                per_shard.append(tuple(layer.info.samples for layer in shard.layers))
        layers = tuple(_with_samples(layer.info, sum(shard[index] for shard in per_shard))
                       for index, layer in enumerate(reference.layers))
        return ShardLayout(paths=tuple(paths), layers=layers, shard_samples=tuple(counts),
                           layer_samples=tuple(per_shard), format=reference.format)


class PlacedSource:
    """A shard's array addressed by sample indices of the concatenated dump.

    Rows ``offset:offset + n`` of the whole dump are rows ``0:n`` of the shard. Reading through
    it lets a shard's pass number its observations as the one-file pass would (which matters for
    statistics that depend on an observation's global position, such as every-k-th-row
    histograms).
    """

    def __init__(self, source, offset: int, total_samples: int):
        self._source = source
        self._offset = offset
        self.shape = (total_samples,) + tuple(source.shape[1:])
        self.dtype = source.dtype

    def read_samples(self, start: int, stop: int, out=None):
        return self._source.read_samples(start - self._offset, stop - self._offset, out=out)

    def read_unit(self, unit: int):
        return self._source.read_unit(unit)

    def read_all(self):
        return self._source.read_all()


def place_layer(layer: Layer, offset: int, total_samples: int) -> Layer:
    """``layer`` of one shard seen inside the concatenated dump: its info says
    ``total_samples`` and its activation arrays answer for samples ``offset`` onwards. Pass
    ``start_sample=offset, stop_sample=offset + shard samples`` to read exactly the shard."""
    sources = {name: PlacedSource(source, offset, total_samples)
               if name in ("preact", "output", "grad") else source
               for name, source in layer.sources.items()}
    return Layer(info=_with_samples(layer.info, total_samples), sources=sources)
