"""A dump must not reach outside itself, unpickle, or expand past its declared limit.

Interfaces.md section 1 (self-contained HDF5) and section 2 (no pickles, member size limits).
The HDF5 features used to build the hostile files (external links, external raw storage,
virtual datasets) are documented h5py APIs.
"""

from __future__ import annotations

import io
import struct
import zipfile

import h5py
import numpy as np
import pytest

from actdoc import errors
from actdoc.io import open_dump

Z = np.linspace(-1, 1, 24, dtype=np.float32).reshape(6, 4)


@pytest.fixture
def outside(tmp_path):
    """A file on the machine that a hostile dump tries to read."""
    path = tmp_path / "secret.h5"
    with h5py.File(path, "w") as f:
        f.create_dataset("data", data=Z)
        f.create_group("layer").create_dataset("preact", data=Z)
    return path


def test_external_link_dataset_refused(tmp_path, outside):
    path = tmp_path / "linked.h5"
    with h5py.File(path, "w") as f:
        f.create_group("layers/fc")["preact"] = h5py.ExternalLink(str(outside), "data")
    with pytest.raises(errors.UnsafeDump, match=r"linked\.h5, layer 'fc', array 'preact': is an "
                                                r"external link to .*secret\.h5"):
        open_dump(path)


def test_external_link_layer_group_refused(tmp_path, outside):
    path = tmp_path / "linked_group.h5"
    with h5py.File(path, "w") as f:
        f.create_group("layers")["fc"] = h5py.ExternalLink(str(outside), "layer")
    with pytest.raises(errors.UnsafeDump, match=r"layer 'fc': the layer is an external link"):
        open_dump(path)


def test_soft_link_through_external_link_refused(tmp_path, outside):
    path = tmp_path / "soft.h5"
    with h5py.File(path, "w") as f:
        f["elsewhere"] = h5py.ExternalLink(str(outside), "layer")
        f.create_group("layers/fc")["preact"] = h5py.SoftLink("/elsewhere/preact")
    with pytest.raises(errors.UnsafeDump, match="another file"):
        open_dump(path)


def test_soft_link_inside_the_file_followed(tmp_path):
    path = tmp_path / "inner.h5"
    with h5py.File(path, "w") as f:
        f.create_dataset("stash/z", data=Z)
        g = f.create_group("layers/fc")
        g.attrs["activation"] = "linear"
        g["preact"] = h5py.SoftLink("/stash/z")
    with open_dump(path) as dump:
        np.testing.assert_array_equal(dump.layers[0].sources["preact"].read_all(), Z)


def test_external_raw_storage_refused(tmp_path):
    raw = tmp_path / "raw.bin"
    raw.write_bytes(Z.tobytes())
    path = tmp_path / "external.h5"
    with h5py.File(path, "w") as f:
        f.create_group("layers/fc").create_dataset(
            "preact", shape=Z.shape, dtype=Z.dtype, external=[(str(raw), 0, Z.nbytes)])
    with pytest.raises(errors.UnsafeDump, match=r"array 'preact': keeps its data in external raw"):
        open_dump(path)


def test_virtual_dataset_refused(tmp_path, outside):
    layout = h5py.VirtualLayout(shape=Z.shape, dtype=Z.dtype)
    layout[:] = h5py.VirtualSource(str(outside), "data", shape=Z.shape)
    path = tmp_path / "virtual.h5"
    with h5py.File(path, "w") as f:
        f.create_group("layers/fc").create_virtual_dataset("output", layout)
    with pytest.raises(errors.UnsafeDump, match=r"array 'output': is a virtual dataset"):
        open_dump(path)


def test_object_array_refused_without_unpickling(tmp_path):
    path = tmp_path / "pickled.npz"
    objects = np.empty((2, 2), dtype=object)
    objects[:] = [[1, "two"], [None, 4.0]]
    np.savez(path, **{"fc/output": objects})
    with pytest.raises(errors.UnsafeDump, match=r"pickled\.npz, layer 'fc', array 'output': "
                                                r"holds Python objects"):
        open_dump(path)


def test_member_over_limit_refused_from_zip_directory(tmp_path):
    """A deflated all-zero member (a dead layer) compresses ~1000x; its declared size counts."""
    path = tmp_path / "zeros.npz"
    np.savez_compressed(path, **{"fc/output": np.zeros((1000, 250), np.float32)})
    assert path.stat().st_size < 10_000
    with pytest.raises(errors.DumpTooLarge, match=r"zeros\.npz, layer 'fc', array 'output': the "
                                                  r"archive declares 1000128 bytes"):
        open_dump(path, member_limit_bytes=100_000)
    with open_dump(path, member_limit_bytes=2_000_000) as dump:
        assert dump.layers[0].info.samples == 1000


def forged_member(shape: tuple[int, ...]) -> bytes:
    """An .npy header claiming ``shape`` float32, followed by only 16 bytes of data."""
    buffer = io.BytesIO()
    np.lib.format.write_array_header_1_0(
        buffer, {"descr": "<f4", "fortran_order": False, "shape": shape})
    return buffer.getvalue() + bytes(16)


def test_forged_header_shape_refused_before_expansion(tmp_path):
    path = tmp_path / "forged.npz"
    with zipfile.ZipFile(path, "w", zipfile.ZIP_DEFLATED) as zf:
        zf.writestr("fc/preact.npy", forged_member((1 << 20, 1 << 20)))
    with pytest.raises(errors.DumpTooLarge, match=r"array 'preact': the \.npy header declares "
                                                  r"shape \[1048576, 1048576\]"):
        open_dump(path)


def test_forged_zip_directory_size_refused(tmp_path):
    """Patch the central directory's uncompressed size (APPNOTE 4.3.12, offset 24) to ~4 GiB."""
    path = tmp_path / "directory.npz"
    np.savez_compressed(path, **{"fc/preact": Z})
    data = bytearray(path.read_bytes())
    central = data.index(b"PK\x01\x02")
    struct.pack_into("<I", data, central + 24, 0xFFFF0000)
    path.write_bytes(bytes(data))
    with pytest.raises(errors.DumpTooLarge, match=r"declares 4294901760 bytes"):
        open_dump(path, member_limit_bytes=1 << 30)


def test_short_member_is_truncation_not_a_crash(tmp_path):
    path = tmp_path / "short.npz"
    with zipfile.ZipFile(path, "w", zipfile.ZIP_STORED) as zf:
        zf.writestr("fc/preact.npy", forged_member((100, 4)))
    with pytest.raises(errors.UnreadableDump, match=r"short\.npz, layer 'fc', array 'preact': "
                                                    r"the header declares 1600 bytes"):
        open_dump(path)
