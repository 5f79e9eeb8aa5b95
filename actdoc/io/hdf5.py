"""The HDF5 reader (docs/contract.md section 1, and section 3 for state-dict weight files).

Datasets are read lazily: blocks of samples go straight into the caller's reused buffer with
``Dataset.read_direct``. A dump must be self-contained, so anything reached through an external
link (at any depth: the /layers group, a layer, a dataset, the probe, or a soft link resolving
through one), datasets stored in external raw files, and virtual datasets are refused before any
read. Soft links are followed by actdoc itself (``actdoc.io.h5links``), only inside the file.
Every failure of the HDF5 library on a damaged file becomes one ``UnreadableDump`` sentence.
"""

from __future__ import annotations

import math
import threading
from pathlib import Path
from typing import Any, Mapping

import h5py
import numpy as np

from actdoc.errors import InvalidDump, UnreadableDump, UnsafeDump, describe
from actdoc.io import statedict
from actdoc.io.base import RawDump, RawLayer
from actdoc.io.direct import FileMap, StorageMap, Tile, storage_map
from actdoc.io.h5links import damaged, read_attributes, resolve
from actdoc.model import LAYER_ARRAYS

SIGNATURE = b"\x89HDF\r\n\x1a\n"
#: Largest user block searched for the signature (HDF5 allows 512 bytes times a power of two).
MAX_USERBLOCK = 1 << 30

def find_signature(path: Path) -> bool:
    """True when the HDF5 signature sits at offset 0 or after a user block (512, 1024, ...)."""
    with open(path, "rb") as handle:
        if handle.read(8) == SIGNATURE:
            return True
        size = path.stat().st_size
        offset = 512
        while offset + 8 <= min(size, MAX_USERBLOCK + 8):
            handle.seek(offset)
            if handle.read(8) == SIGNATURE:
                return True
            offset *= 2
    return False


_UNMAPPED = object()


class HDF5Source:
    """An ArraySource over one h5py Dataset of an open file.

    Given the file's ``FileMap``, blocks of an uncompressed float dataset are copied from the
    map instead of through h5py (``actdoc.io.direct``), and ``tiles`` offers them uncopied.
    """

    def __init__(self, dataset: h5py.Dataset, path: Path, layer: str | None, array: str,
                 files: FileMap | None = None):
        self._ds = dataset
        self._where = describe(path, layer, array)
        self.shape = tuple(int(n) for n in dataset.shape)
        self.dtype = dataset.dtype
        self._files = files
        self._storage = _UNMAPPED if files is not None else None
        self._lock = threading.Lock()

    def storage(self) -> StorageMap | None:
        """The dataset's place in the file map (found on first use), or None."""
        if self._storage is _UNMAPPED:
            with self._lock:
                if self._storage is _UNMAPPED:
                    try:
                        self._storage = storage_map(self._ds, self._files)
                    except MemoryError:
                        raise
                    except Exception:  # h5py's own read will report the problem
                        self._storage = None
        return self._storage

    def tiles(self, start: int, stop: int) -> list[Tile] | None:
        """Uncopied views of rows ``start:stop`` as ``(row0, row1, col0, col1, values)``,
        or None where the dataset cannot be mapped (then read blocks with read_samples)."""
        storage = self.storage()
        if storage is None:
            return None
        try:
            return storage.tiles(start, min(stop, self.shape[0]))
        except OSError:  # no address space left for a map: h5py reads it instead
            return None

    def release(self, start: int, stop: int, units: slice | None = None) -> None:
        """Drop the mapped pages of rows ``start:stop`` (of ``units``, or all) once their
        tiles are measured."""
        storage = self.storage()
        if storage is not None:
            storage.release(start, min(stop, self.shape[0]), units)

    def _failed(self, exc: Exception) -> UnreadableDump:
        text = str(exc).replace("\n", " ")[:200]
        return UnreadableDump(f"{self._where}: reading the data failed; the file is truncated or "
                              f"corrupt ({type(exc).__name__}: {text})")

    def read_samples(self, start: int, stop: int, out: np.ndarray | None = None) -> np.ndarray:
        """Rows ``start:stop``; into ``out`` with read_direct when it is a fitting C buffer."""
        stop = min(stop, self.shape[0])
        rows = (stop - start,) + self.shape[1:]
        try:
            if (out is not None and out.shape == rows and out.dtype == self.dtype
                    and out.flags.c_contiguous and out.flags.writeable):
                storage = self.storage()
                if storage is not None:
                    try:
                        return storage.fill(start, stop, out)
                    except OSError:  # no address space left for a map: h5py reads it
                        pass
                if out.size:
                    self._ds.read_direct(out, np.s_[start:stop])
                return out
            return self._ds[start:stop]
        except MemoryError:
            raise
        except Exception as exc:  # any failure of the library on a damaged file
            raise self._failed(exc) from None

    def read_unit(self, unit: int) -> np.ndarray:
        try:
            return self._ds[:, unit]
        except MemoryError:
            raise
        except Exception as exc:  # any failure of the library on a damaged file
            raise self._failed(exc) from None

    def read_all(self) -> np.ndarray:
        try:
            return self._ds[()]
        except MemoryError:
            raise
        except Exception as exc:  # any failure of the library on a damaged file
            raise self._failed(exc) from None


#: Datasets declaring more bytes than this are checked for unwritten storage.
UNWRITTEN_CHECK_BYTES = 64 << 20
#: Deflate, the one compression filter h5py always has, packs at most about 1032:1 (an all-zero
#: dead layer), so a dataset that stores less than 1/1100 of its declared size was never written.
MAX_STORED_RATIO = 1100
#: Largest chunk read: HDF5 reads and decompresses a whole chunk to return any part of it, so a
#: 4 GiB chunk of deflated zeros (4 MB on disk) holding ten rows would cost 4 GiB of memory. Our
#: writer's chunks are 1 MiB; HDF5's documentation advises chunks of about 1 MiB.
MAX_CHUNK_BYTES = 256 * 1024**2


def checked_dataset(group: h5py.Group, name: str, path: Path, layer: str | None,
                    array: str) -> h5py.Dataset | None:
    """The dataset ``group[name]`` after the self-containment checks, or None if it is absent.

    Refuses external links, soft links that leave the file, external raw storage and virtual
    datasets; each refusal names the file, layer and array.
    """
    where = describe(path, layer, array)
    obj = resolve(group, name, where)
    if obj is None:
        return None
    if not isinstance(obj, h5py.Dataset):
        raise InvalidDump(f"{where}: expected a dataset, found a group")
    with damaged(where, "reading the dataset's description"):
        if obj.shape is None:
            raise InvalidDump(f"{where}: has no shape (an empty dataspace, as h5py.Empty "
                              f"writes); expected an array")
        if Path(obj.file.filename).resolve() != Path(group.file.filename).resolve():
            raise UnsafeDump(f"{where}: a link leads to another file; a dump must be "
                             f"self-contained")
        if obj.is_virtual:
            raise UnsafeDump(f"{where}: is a virtual dataset assembled from other files; a dump "
                             f"must be self-contained")
        if obj.id.get_create_plist().get_external_count() > 0:
            raise UnsafeDump(f"{where}: keeps its data in external raw files; a dump must be "
                             f"self-contained")
        obj.dtype  # noqa: B018  a damaged datatype message fails here, not later
        stored = obj.id.get_storage_size()
        chunk_bytes = math.prod(obj.chunks) * obj.dtype.itemsize if obj.chunks else 0
    if chunk_bytes > MAX_CHUNK_BYTES:
        raise InvalidDump(f"{where}: is stored in chunks of {chunk_bytes} bytes, more than the "
                          f"{MAX_CHUNK_BYTES} bytes actdoc reads at once (HDF5 decompresses a whole "
                          f"chunk to read any part of it); rewrite it with smaller chunks")
    declared = int(np.prod(obj.shape, dtype=np.float64)) * obj.dtype.itemsize
    if declared > UNWRITTEN_CHECK_BYTES and stored * MAX_STORED_RATIO < declared:
        raise InvalidDump(
            f"{where}: declares {declared / 2**30:.1f} GiB but stores only "
            f"{stored} bytes: most of it was never written, and reading it "
            f"would analyse fill values")
    return obj


def tracks_order(group: h5py.Group) -> bool:
    """Whether the group records link creation order (h5py iterates in that order then)."""
    return bool(group.id.get_create_plist().get_link_creation_order()
                & h5py.h5p.CRT_ORDER_TRACKED)


def layer_groups(layers: h5py.Group, path: Path) -> list[tuple[str, h5py.Group]]:
    """The groups under /layers, in the group's iteration order, reached only inside the file."""
    if not isinstance(layers, h5py.Group):
        raise InvalidDump(f"{describe(path)}: '/layers' is a dataset; expected a group")
    with damaged(describe(path), "listing the layers"):
        names = list(layers)
    out = []
    for name in names:
        group = resolve(layers, name, describe(path, name), "the layer")
        if isinstance(group, h5py.Group):
            out.append((name, group))
    return out


def read_layers_layout(layers: h5py.Group, path: Path,
                       files: FileMap | None = None) -> tuple[tuple[RawLayer, ...], str]:
    """RawLayers of the /layers layout and how to order them when ``order`` is missing."""
    raw = []
    for position, (name, group) in enumerate(layer_groups(layers, path)):
        arrays = {}
        for array in LAYER_ARRAYS:
            ds = checked_dataset(group, array, path, name, array)
            if ds is not None:
                mapped = files if array in ("preact", "output") else None
                arrays[array] = HDF5Source(ds, path, name, array, mapped)
        attrs = read_attributes(group, describe(path, name))
        raw.append(RawLayer(name=name, attrs=attrs, arrays=arrays, position=position))
    with damaged(describe(path), "reading the layers group's properties"):
        ordering = "position" if tracks_order(layers) else "natural"
    return tuple(raw), ordering


def read_state_dict(handle: h5py.File, path: Path) -> tuple[tuple[RawLayer, ...], str]:
    """RawLayers from root datasets named ``<layer>.weight`` / ``<layer>.bias``."""
    with damaged(describe(path), "listing the root group"):
        names = [name for name in handle if statedict.parameter_of(name) is not None]
        # The root group's plist, not the File's: the file's reports no order tracking at all.
        ordered = tracks_order(handle["/"])
    if not ordered:
        from actdoc.io.base import natural_key

        names.sort(key=natural_key)

    def source(key: str) -> HDF5Source:
        layer, array = statedict.parameter_of(key)
        return HDF5Source(checked_dataset(handle, key, path, layer, array), path, layer, array)

    return statedict.raw_layers(names, source), "position"


def probe_input(handle: h5py.File, path: Path) -> HDF5Source | None:
    """/probe/input when present (checked like any dataset)."""
    probe = resolve(handle, "probe", describe(path), "the probe group")
    if not isinstance(probe, h5py.Group):
        return None
    ds = checked_dataset(probe, "input", path, None, "probe/input")
    return None if ds is None else HDF5Source(ds, path, None, "probe/input")


class HDF5Reader:
    """Reader for HDF5 dumps: the /layers layout, or a state-dict weight file."""

    name = "hdf5"

    def sniff(self, head: bytes) -> bool:
        return head[:8] == SIGNATURE

    def read(self, path: Path, options: Mapping[str, Any]) -> RawDump:
        try:
            handle = h5py.File(path, "r")
        except MemoryError:
            raise
        except Exception as exc:  # h5py reports a damaged superblock in many ways
            raise UnreadableDump(f"{describe(path)}: not a readable HDF5 file; it is truncated or "
                                 f"corrupt ({type(exc).__name__}: {exc})") from None
        files = FileMap(path)

        def close() -> None:
            files.close()
            handle.close()

        try:
            layers_group = resolve(handle, "layers", describe(path), "the layers group")
            if layers_group is not None:
                layers, ordering = read_layers_layout(layers_group, path, files)
            else:
                layers, ordering = read_state_dict(handle, path)
            probe = probe_input(handle, path)
        except BaseException:
            close()
            raise
        return RawDump(path=path, format="hdf5", layers=layers, probe_input=probe,
                       closer=close, ordering=ordering)


def chunk_shape(units: int, spatial: tuple[int, ...], rows: int = 1024,
                unit_chunk: int = 256) -> tuple[int, ...]:
    """The writer's chunk shape: ``rows`` samples by up to 256 units (whole spatial maps),
    with rows cut so a chunk of a spatial layer holds about as many values as (1024, 256)."""
    units_part = max(1, min(units, unit_chunk))
    budget = max(1, (1024 * 256) // (units_part * max(1, math.prod(spatial))))
    return (max(1, min(rows, budget)), units_part) + tuple(spatial)


READER = HDF5Reader()
