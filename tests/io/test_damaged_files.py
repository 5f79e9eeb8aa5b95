"""Damaged dumps end in one sentence and exit status 2, never a traceback (docs/dump-layout.md,
"Validation"; the one-sentence rule is the project's own).

The HDF5 cases are single mutations of the committed demo dumps that, before the readers were
hardened, escaped as RuntimeError, KeyError or ValueError from h5py (found by the fuzz run,
tests/fuzz/long_run.py). The NPZ cases damage one documented field of the zip format (PKWARE
APPNOTE.TXT: local header 4.3.7, central directory 4.3.12, LZMA properties 5.8.8) or of the
``.npy`` header (numpy's NPY format description, NEP 1) in a file written with numpy.
"""

from __future__ import annotations

import io
import struct
import zipfile

import numpy as np
import pytest

from actdoc import errors
from actdoc.cli import main
from actdoc.io import open_dump
from tests.support.mutants import DEMO_DUMPS, Mutation

Z = np.linspace(-2, 2, 48, dtype=np.float32).reshape(12, 4)


def read_everything(path) -> None:
    """Open the dump and read every array as the analysis does."""
    with open_dump(path) as dump:
        for layer in dump.layers:
            for _ in layer.paired_blocks(4096):
                pass
            for array in ("preact", "output"):
                if layer.info.has(array):
                    layer.unit_values(array, layer.info.units - 1)
            layer.weight()


def one_sentence(capsys, path) -> str:
    """``actdoc analyze`` on the file: exit 2 and one line naming the file."""
    assert main(["analyze", str(path)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "Traceback" not in err
    assert err.startswith(f"actdoc: {path.name}")
    return err


@pytest.mark.parametrize("seed, mutation, fault", [
    # h5py's RuntimeError "Unable to synchronously check link existence (bad symbol table node
    # signature)" when the link of an array was looked up.
    ("logistic_near_binary.h5", Mutation("insert", 164146, 0x43, 64), "looking up a link"),
    # ValueError "Insufficient precision in available types" from a damaged float datatype.
    ("tanh_raw_inputs.h5", Mutation("flip", 287578, 5), "dataset's description"),
    # KeyError "Unable to synchronously open object (bad object header version number)" when a
    # layer group was opened.
    ("logistic_near_binary.h5", Mutation("insert", 3683, 0x39, 2), "opening it"),
], ids=["link-lookup", "datatype", "object-header"])
def test_damaged_demo_dump_is_one_sentence(tmp_path, capsys, seed, mutation, fault):
    path = tmp_path / f"damaged_{seed}"
    path.write_bytes(mutation.apply((DEMO_DUMPS / seed).read_bytes()))
    with pytest.raises(errors.UnreadableDump, match=fault):
        read_everything(path)
    assert "truncated or corrupt" in one_sentence(capsys, path)


def npz_bytes(method: int = zipfile.ZIP_STORED, array: np.ndarray = Z,
              key: str = "fc/preact") -> bytes:
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w", method) as zf:
        with zf.open(key + ".npy", "w") as member:
            np.lib.format.write_array(member, array, allow_pickle=False)
    return buffer.getvalue()


def test_lzma_member_with_damaged_properties(tmp_path, capsys):
    """APPNOTE 5.8.8: an LZMA member starts with 2 version bytes, a 2-byte size, then the
    properties; 0xff as the first property byte is not a valid lc/lp/pb combination."""
    data = bytearray(npz_bytes(zipfile.ZIP_LZMA))
    name_length, extra_length = struct.unpack_from("<HH", data, 26)
    data[30 + name_length + extra_length + 4] = 0xFF
    path = tmp_path / "lzma_props.npz"
    path.write_bytes(bytes(data))
    with pytest.raises(errors.UnreadableDump, match=r"array 'preact': the LZMA member's "
                                                    r"properties are invalid"):
        open_dump(path)
    one_sentence(capsys, path)


@pytest.mark.parametrize("method", [zipfile.ZIP_DEFLATED, zipfile.ZIP_BZIP2, zipfile.ZIP_LZMA],
                         ids=["deflate", "bzip2", "lzma"])
def test_damaged_compressed_data_is_found_when_read(tmp_path, capsys, method):
    """Flip bits in the middle of the compressed data: either the decompressor fails or the
    member's CRC-32 (APPNOTE 4.4.7) no longer matches; both are one sentence."""
    rng = np.random.default_rng(0)
    data = bytearray(npz_bytes(method, rng.normal(size=(200, 8)).astype(np.float32)))
    central = data.index(b"PK\x01\x02")
    for position in range(central // 2, central // 2 + 40):
        data[position] ^= 0x55
    path = tmp_path / "flipped.npz"
    path.write_bytes(bytes(data))
    with pytest.raises(errors.UnreadableDump, match=r"flipped\.npz, layer 'fc', array 'preact'"):
        read_everything(path)
    one_sentence(capsys, path)


def test_local_header_offset_past_the_end(tmp_path, capsys):
    """APPNOTE 4.3.12: the central directory's "relative offset of local header" (offset 42)."""
    data = bytearray(npz_bytes())
    central = data.index(b"PK\x01\x02")
    struct.pack_into("<I", data, central + 42, 0x7FFFFFF0)
    path = tmp_path / "offset.npz"
    path.write_bytes(bytes(data))
    with pytest.raises(errors.UnreadableDump, match=r"array 'preact': the archive's local header "
                                                    r"is damaged"):
        open_dump(path)
    one_sentence(capsys, path)


def test_unknown_compression_method(tmp_path, capsys):
    """APPNOTE 4.4.5: method 99 (AES) is not one actdoc reads (nor Python's zipfile)."""
    data = bytearray(npz_bytes(zipfile.ZIP_DEFLATED))
    central = data.index(b"PK\x01\x02")
    struct.pack_into("<H", data, central + 10, 99)
    struct.pack_into("<H", data, 8, 99)
    path = tmp_path / "method.npz"
    path.write_bytes(bytes(data))
    with pytest.raises(errors.UnreadableDump, match=r"compression method 99"):
        open_dump(path)
    one_sentence(capsys, path)


def npy_member(header: bytes, version: int = 1) -> bytes:
    """A ``.npy`` member with the given raw header text (NEP 1 layout) and 64 bytes of data."""
    width = "<H" if version == 1 else "<I"
    return b"\x93NUMPY" + bytes([version, 0]) + struct.pack(width, len(header)) + header + \
        bytes(64)


@pytest.mark.parametrize("member, fault", [
    (npy_member(b"{'descr': '<f4', 'fortran_order': False, 'shape': (4, 4)"),
     "not a Python literal"),
    (npy_member(b"{'descr': '<f4', 'fortran_order': False, 'shape': " + b"(" * 3000 + b")"
                * 3000 + b"}"), "not a Python literal"),
    (npy_member(b"{'descr': '<f4', 'fortran_order': False, 'shape': (4, -4)}"),
     "not a tuple of non-negative integers"),
    (npy_member(b"{'descr': '<f4', 'fortran_order': 'no', 'shape': (4, 4)}"),
     "fortran_order is not True or False"),
    (npy_member(b"{'descr': '<f4', 'shape': (4, 4)}"), "exactly descr, fortran_order and shape"),
    (npy_member(b"{'descr': 'not a dtype', 'fortran_order': False, 'shape': (4, 4)}"),
     "not one numpy knows"),
    (npy_member(b" " * 20_000, version=2), "more than the 10000 accepted"),
    (b"\x93NUMPY\x09\x00" + bytes(80), "unknown .npy format version 9"),
    (b"PK\x03\x04" + bytes(80), "magic string is missing"),
], ids=["unterminated", "nested", "negative", "fortran", "missing-key", "descr", "long",
        "version", "magic"])
def test_damaged_npy_header(tmp_path, capsys, member, fault):
    path = tmp_path / "header.npz"
    for method, label in ((zipfile.ZIP_STORED, "stored"), (zipfile.ZIP_BZIP2, "bzip2")):
        with zipfile.ZipFile(path, "w", method) as zf:
            zf.writestr("fc/preact.npy", member)
        with pytest.raises(errors.UnreadableDump, match=fault):
            open_dump(path)
        one_sentence(capsys, path)


def test_structured_dtype_is_not_numbers(tmp_path):
    """numpy writes a record dtype's descr as a list of fields (NEP 1)."""
    path = tmp_path / "record.npz"
    np.savez(path, **{"fc/preact": np.zeros((3, 2), dtype=[("a", "<f4"), ("b", "<f4")])})
    with pytest.raises(errors.InvalidDump, match=r"array 'preact': a structured dtype"):
        open_dump(path)
