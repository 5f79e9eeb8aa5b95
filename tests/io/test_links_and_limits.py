"""No link leaves the file at any depth, and ReadLimits hold before any data is read
(docs/dump-layout.md, "Links" and "Size limits").

The hostile files use documented h5py APIs: ``h5py.ExternalLink(filename, path)`` and
``h5py.SoftLink(path)`` ("Groups" page of the h5py docs, section "Links"), which HDF5 resolves
when a path is opened. The archive bombs use Python's ``zipfile`` with the bzip2 and LZMA methods
(PKWARE APPNOTE.TXT 4.4.5); memory is measured as the peak resident size of a forked child
(``os.wait4`` rusage, Python's os docs).
"""

from __future__ import annotations

import struct
import zipfile

import h5py
import numpy as np
import pytest

from actdoc import errors
from actdoc.cli import main
from actdoc.io import ReadLimits, open_dump
from actdoc.io.writer import write_dump, write_npz
from tests.support.fuzzing import CaseRunner

Z = np.linspace(-1, 1, 24, dtype=np.float32).reshape(6, 4)


@pytest.fixture
def outside(tmp_path):
    """Another HDF5 file on the machine, holding a complete layout a dump could borrow."""
    path = tmp_path / "secret.h5"
    write_dump(path, {"fc": {"activation": "linear", "preact": Z, "output": Z}})
    with h5py.File(path, "a") as f:
        f.create_dataset("data", data=Z)
    return path


def refused(path, match: str, capsys) -> None:
    with pytest.raises(errors.UnsafeDump, match=match):
        open_dump(path)
    assert main(["analyze", str(path)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "Traceback" not in err


def test_layers_group_as_external_link(tmp_path, outside, capsys):
    """``f["layers"] = h5py.ExternalLink(other, "/layers")``: the other file's weights must not
    appear as this dump's."""
    path = tmp_path / "borrowed.h5"
    with h5py.File(path, "w") as f:
        f["layers"] = h5py.ExternalLink(str(outside), "/layers")
    refused(path, r"^borrowed\.h5: the layers group is an external link to '.*secret\.h5'",
            capsys)


@pytest.mark.parametrize("target", ["/nonexistent/missing.h5", "/etc/passwd"],
                         ids=["missing", "not-hdf5"])
def test_external_link_to_a_missing_or_foreign_file(tmp_path, capsys, target):
    """HDF5 fails to open the target with a KeyError; actdoc refuses before trying."""
    path = tmp_path / "dangling.h5"
    with h5py.File(path, "w") as f:
        f.create_group("layers")["fc"] = h5py.ExternalLink(target, "/layers/fc")
    refused(path, rf"layer 'fc': the layer is an external link to '{target}'", capsys)


def test_probe_group_and_probe_input_as_external_links(tmp_path, outside, capsys):
    for label, make, message in (
            ("group", lambda f: f.__setitem__("probe", h5py.ExternalLink(str(outside), "/")),
             r"^probe_group\.h5: the probe group is an external link"),
            ("input", lambda f: f.create_group("probe").__setitem__(
                "input", h5py.ExternalLink(str(outside), "/data")),
             r"^probe_input\.h5, array 'probe/input': is an external link")):
        path = tmp_path / f"probe_{label}.h5"
        write_dump(path, {"fc": {"activation": "linear", "preact": Z, "output": Z}})
        with h5py.File(path, "a") as f:
            make(f)
        refused(path, message, capsys)


def test_soft_link_chain_through_an_external_link(tmp_path, outside, capsys):
    """A soft link to a soft link to a group behind an external link, two levels down."""
    path = tmp_path / "chain.h5"
    with h5py.File(path, "w") as f:
        f["elsewhere"] = h5py.ExternalLink(str(outside), "/layers")
        f["hop"] = h5py.SoftLink("/elsewhere/fc")
        f.create_group("layers")["fc"] = h5py.SoftLink("/hop")
    refused(path, r"layer 'fc': a soft link leads through an external link to '.*secret\.h5'",
            capsys)


def test_soft_link_loop_is_one_sentence(tmp_path, capsys):
    path = tmp_path / "loop.h5"
    with h5py.File(path, "w") as f:
        group = f.create_group("layers/fc")
        group.create_dataset("output", data=Z)
        group["preact"] = h5py.SoftLink("/layers/fc/preact")
    with pytest.raises(errors.InvalidDump, match=r"array 'preact': soft links form a loop"):
        open_dump(path)


def test_dangling_soft_link_is_an_absent_array(tmp_path):
    path = tmp_path / "dangling_soft.h5"
    with h5py.File(path, "w") as f:
        group = f.create_group("layers/fc")
        group.attrs["activation"] = "linear"
        group.create_dataset("output", data=Z)
        group["preact"] = h5py.SoftLink("/nowhere/preact")
    with open_dump(path) as dump:
        assert sorted(dump.layers[0].info.arrays) == ["output"]


def test_units_per_layer(tmp_path, capsys):
    path = tmp_path / "wide.npz"
    write_npz(path, {"fc": {"activation": "relu", "preact": np.zeros((1, 300_000), "f4")}})
    with pytest.raises(errors.DumpTooLarge, match=r"^wide\.npz, layer 'fc', array 'preact': "
                                                  r"declares 300000 units, more than the limit "
                                                  r"of 262144 units per layer"):
        open_dump(path, limits=ReadLimits.for_uploads())
    with open_dump(path) as dump:  # the command line's default has no such limit
        assert dump.layers[0].info.units == 300_000
    assert main(["check", str(path), "--max-units", "1000"]) == 2
    assert "--max-units" in capsys.readouterr().err


def test_weight_bytes(tmp_path, capsys):
    path = tmp_path / "heavy.h5"
    write_dump(path, {"fc": {"activation": "relu", "weight": np.ones((100, 100), "f4")}})
    with pytest.raises(errors.DumpTooLarge, match=r"layer 'fc', array 'weight': declares 40000 "
                                                  r"bytes \(39\.1 KiB\) of weights, more than "
                                                  r"the limit of 30000 bytes"):
        open_dump(path, limits=ReadLimits(weight_bytes=30_000))
    assert main(["analyze", str(path), "--max-weight-bytes", "30000"]) == 2
    assert main(["analyze", str(path), "--max-weight-bytes", "40K", "--format", "json"]) == 0


def test_total_bytes_names_the_array_that_passes_it(tmp_path):
    path = tmp_path / "total.h5"
    layers = {name: {"activation": "relu", "preact": np.zeros((100, 10), "f4"),
                     "output": np.zeros((100, 10), "f4")} for name in ("a", "b")}
    write_dump(path, layers)  # 4 arrays of 4000 bytes
    with pytest.raises(errors.DumpTooLarge, match=r"layer 'b', array '(preact|output)': brings "
                                                  r"the arrays' declared size to 12000 bytes"):
        open_dump(path, limits=ReadLimits(total_bytes=10_000))
    with open_dump(path, limits=ReadLimits(total_bytes=16_000)) as dump:
        assert len(dump.layers) == 2


def test_limits_hold_before_any_data_is_read(tmp_path):
    """A deflated member whose data is damaged: over the limit it is refused as too large
    (no byte of data decompressed); within the limit the damage is found on reading."""
    path = tmp_path / "damaged.npz"
    np.savez_compressed(path, **{"fc/preact": np.random.default_rng(0).normal(
        size=(500, 20)).astype(np.float32)})
    data = bytearray(path.read_bytes())
    central = data.index(b"PK\x01\x02")
    for position in range(central - 400, central - 300):
        data[position] ^= 0xA5
    path.write_bytes(bytes(data))
    with pytest.raises(errors.DumpTooLarge, match="array 'preact'"):
        open_dump(path, limits=ReadLimits(total_bytes=1000))
    with pytest.raises(errors.UnreadableDump, match="array 'preact'"):
        with open_dump(path, activations=["relu"]) as dump:
            for _ in dump.layers[0].paired_blocks(100):
                pass


def test_cli_size_option_is_checked_by_argparse(capsys):
    with pytest.raises(SystemExit) as stop:
        main(["check", "x.h5", "--max-total-bytes", "lots"])
    assert stop.value.code == 2
    assert "'lots' is not a size" in capsys.readouterr().err


@pytest.fixture(scope="module")
def runner():
    with CaseRunner() as case_runner:
        yield case_runner


@pytest.mark.parametrize("method", [zipfile.ZIP_BZIP2, zipfile.ZIP_LZMA], ids=["bzip2", "lzma"])
def test_compressed_header_is_read_without_expanding_the_member(tmp_path, runner, method):
    """A .npy header declaring 16 values followed by 48 MiB of zeros, bzip2- or LZMA-compressed
    to a few kilobytes. Reading the header and the 64 bytes of data must not expand the rest
    (Python's zipfile would hand the decompressor whole input chunks with no output bound)."""
    small = tmp_path / "small.npz"
    np.savez(small, **{"fc/preact": np.ones((4, 4), np.float32)})
    bomb = tmp_path / "bomb.npz"
    header = small.read_bytes()
    with zipfile.ZipFile(small) as zf:
        member = zf.read("fc/preact.npy")
    with zipfile.ZipFile(bomb, "w", method) as zf:
        with zf.open("fc/preact.npy", "w", force_zip64=True) as out:
            out.write(member)
            zeros = bytes(1 << 20)
            for _ in range(48):
                out.write(zeros)
    assert bomb.stat().st_size < 200_000 and header
    baseline = runner.run(small, memory=512 * 2**20)
    result = runner.run(bomb, memory=512 * 2**20)
    assert baseline["outcome"] == "ok" and result["outcome"] == "ok", result
    assert result["peak_rss"] - baseline["peak_rss"] < 24 * 2**20


def test_lzma_dictionary_size_is_bounded_by_the_member(tmp_path, runner):
    """APPNOTE 5.8.8 / the LZMA properties: byte 0 is lc/lp/pb, bytes 1-4 the dictionary size,
    which liblzma allocates before decoding. A forged 4 GiB dictionary on a small member must
    not be allocated (found by the long fuzz run as a MemoryError)."""
    path = tmp_path / "dictionary.npz"
    with zipfile.ZipFile(path, "w", zipfile.ZIP_LZMA) as zf:
        with zf.open("fc/preact.npy", "w") as member:
            np.lib.format.write_array(member, Z)
    data = bytearray(path.read_bytes())
    name_length, extra_length = struct.unpack_from("<HH", data, 26)
    props = 30 + name_length + extra_length + 4
    struct.pack_into("<I", data, props + 1, 0xFFFFFFFF)
    path.write_bytes(bytes(data))
    result = runner.run(path, memory=512 * 2**20)
    assert result["outcome"] == "ok", result
    with open_dump(path, activations=["linear"]) as dump:
        np.testing.assert_array_equal(dump.layers[0].sources["preact"].read_all(), Z)


def test_a_huge_chunk_around_a_few_rows_is_refused(tmp_path):
    """HDF5 decompresses a whole chunk to read any part of it ("Chunking in HDF5", HDF Group
    docs): ten rows in a deflated 512 MiB chunk of a file of a few hundred kilobytes cost 512 MiB
    (measured: a 256 MiB chunk in a 271 KB file took 302 MB to read). The chunk shape is
    declared, so the refusal needs no chunk written."""
    path = tmp_path / "bigchunk.h5"
    with h5py.File(path, "w") as f:
        group = f.create_group("layers/fc")
        group.attrs["activation"] = "relu"
        group.create_dataset("preact", shape=(10, 4), dtype="f4", maxshape=(None, None),
                             chunks=(2**17, 1024), compression="gzip")
    with pytest.raises(errors.InvalidDump, match=r"array 'preact': is stored in chunks of "
                                                 r"536870912 bytes"):
        open_dump(path)
