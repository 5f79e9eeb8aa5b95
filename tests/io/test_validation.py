"""Bad input: one sentence naming the file, the layer and the array, as an actdoc.errors class.

Each file is built with plain h5py or numpy, breaking one rule of docs/contract.md sections 1-2.
"""

from __future__ import annotations

import importlib

import h5py
import numpy as np
import pytest

from actdoc import errors
from actdoc.io import open_dump
from actdoc.io.memory import dump_from_arrays

Z = np.linspace(-2, 2, 40, dtype=np.float32).reshape(10, 4)


def hdf5_file(path, layers):
    with h5py.File(path, "w") as f:
        for name, spec in layers.items():
            g = f.create_group(f"layers/{name}")
            for key, value in spec.items():
                if isinstance(value, str):
                    g.attrs[key] = value
                else:
                    g.create_dataset(key, data=value)


def npz_file(path, arrays):
    with open(path, "wb") as handle:
        np.savez(handle, **arrays)


CASES = {
    "no layers": (lambda p: hdf5_file(p, {}), errors.InvalidDump, ["holds no layers"]),
    "empty samples": (lambda p: hdf5_file(p, {"fc": {"preact": np.zeros((0, 4), "f4")}}),
                      errors.InvalidDump, ["layer 'fc'", "array 'preact'", "empty"]),
    "empty units": (lambda p: hdf5_file(p, {"fc": {"output": np.zeros((5, 0), "f4")}}),
                    errors.InvalidDump, ["layer 'fc'", "array 'output'", "empty"]),
    "shapes disagree": (lambda p: hdf5_file(p, {"fc": {"preact": Z, "output": Z[:, :3]}}),
                        errors.InvalidDump, ["layer 'fc'", "array 'output'", "[10, 3]",
                                             "[10, 4]"]),
    "samples disagree": (lambda p: hdf5_file(p, {"fc": {"preact": Z, "output": Z[:9]}}),
                         errors.InvalidDump, ["layer 'fc'", "array 'output'", "must match"]),
    "weight rows": (lambda p: hdf5_file(p, {"fc": {"preact": Z, "weight": np.ones((3, 2))}}),
                    errors.InvalidDump, ["layer 'fc'", "array 'weight'", "3 rows", "4 units"]),
    "bias length": (lambda p: hdf5_file(p, {"fc": {"preact": Z, "bias": np.ones(5)}}),
                    errors.InvalidDump, ["layer 'fc'", "array 'bias'", "5 entries", "4 units"]),
    "preact rank": (lambda p: hdf5_file(p, {"fc": {"preact": np.ones(8, "f4")}}),
                    errors.InvalidDump, ["layer 'fc'", "array 'preact'", "[samples, units]"]),
    "weight rank": (lambda p: hdf5_file(p, {"fc": {"weight": np.ones(8)}}),
                    errors.InvalidDump, ["layer 'fc'", "array 'weight'", "[units, fan_in]"]),
    "bias rank": (lambda p: hdf5_file(p, {"fc": {"bias": np.ones((2, 2))}}),
                  errors.InvalidDump, ["layer 'fc'", "array 'bias'", "expected shape [units]"]),
    "unknown activation": (lambda p: hdf5_file(p, {"fc": {"preact": Z, "activation": "sine"}}),
                           errors.UnknownActivation, ["layer 'fc'", "'sine'", "relu", "gelu"]),
    "complex dtype": (lambda p: hdf5_file(p, {"fc": {"preact": Z.astype(np.complex64)}}),
                      errors.InvalidDump, ["layer 'fc'", "array 'preact'", "complex64"]),
    "integer preact": (lambda p: hdf5_file(p, {"fc": {"preact": np.ones((3, 2), "i4"),
                                                      "activation": "relu"}}),
                       errors.InvalidDump, ["layer 'fc'", "array 'preact'", "int32", "relu"]),
    "integer relu output": (lambda p: hdf5_file(p, {"fc": {"output": np.ones((3, 2), "i4"),
                                                           "activation": "relu"}}),
                            errors.InvalidDump, ["layer 'fc'", "array 'output'", "threshold"]),
    "float128": (lambda p: npz_file(p, {"fc/preact": Z.astype(np.longdouble)}),
                 errors.InvalidDump, ["layer 'fc'", "array 'preact'", "float16, float32"]),
    "string npz": (lambda p: npz_file(p, {"fc/output": np.array([["a", "b"]])}),
                   errors.InvalidDump, ["layer 'fc'", "array 'output'", "<U1"]),
    "bad meta": (lambda p: npz_file(p, {"fc/preact": Z, "actdoc_meta": np.array("{oops")}),
                 errors.InvalidDump, ["array 'actdoc_meta'", "JSON"]),
    "meta lists missing layer": (
        lambda p: npz_file(p, {"fc/preact": Z,
                               "actdoc_meta": np.array('{"layers": [{"name": "gone"}]}')}),
        errors.InvalidDump, ["layer 'gone'", "actdoc_meta"]),
    "bad order attribute": (
        lambda p: npz_file(p, {"fc/preact": Z, "actdoc_meta": np.array(
            '{"layers": [{"name": "fc", "order": "first"}]}')}),
        errors.InvalidDump, ["layer 'fc'", "'order'", "integer"]),
    "not a dump": (lambda p: p.write_bytes(b"GIF89a not a dump at all"),
                   errors.UnsupportedFormat, ["neither HDF5, NPZ nor safetensors"]),
    "lone npy": (lambda p: np.save(open(p, "wb"), Z), errors.UnsupportedFormat, ["np.savez"]),
    "empty file": (lambda p: p.write_bytes(b""), errors.UnsupportedFormat, ["empty"]),
    "truncated hdf5": (lambda p: (hdf5_file(p, {"fc": {"preact": Z}}),
                                  p.write_bytes(p.read_bytes()[:600])),
                       errors.UnreadableDump, ["truncated or corrupt"]),
    "truncated npz": (lambda p: (npz_file(p, {"fc/preact": Z}),
                                 p.write_bytes(p.read_bytes()[:-30])),
                      errors.UnreadableDump, ["truncated or corrupt"]),
}


@pytest.mark.parametrize("case", sorted(CASES))
def test_bad_input_names_file_layer_array(tmp_path, case):
    build, error, fragments = CASES[case]
    path = tmp_path / "bad_dump.bin"
    build(path)
    with pytest.raises(error) as caught:
        open_dump(path).close()
    message = str(caught.value)
    assert message.startswith("bad_dump.bin")
    assert "\n" not in message
    for fragment in fragments:
        assert fragment in message


def test_missing_file(tmp_path):
    with pytest.raises(errors.UnreadableDump, match=r"^absent\.h5: no such file$"):
        open_dump(tmp_path / "absent.h5")


def test_folder_is_not_a_dump(tmp_path):
    with pytest.raises(errors.UnreadableDump, match="is a folder"):
        open_dump(tmp_path)


def test_corrupt_data_reported_on_read(tmp_path):
    """A damaged deflate stream is found when the rows are read, still as one sentence."""
    path = tmp_path / "damaged.npz"
    rng = np.random.default_rng(0)
    with open(path, "wb") as handle:
        np.savez_compressed(handle, **{"fc/preact": rng.normal(size=(400, 50))})
    data = bytearray(path.read_bytes())
    for i in range(2000, 2400):
        data[i] ^= 0x5A
    path.write_bytes(bytes(data))
    with pytest.raises(errors.UnreadableDump, match=r"damaged\.npz, layer 'fc', array 'preact'"):
        with open_dump(path, activations=["fc=relu"]) as dump:
            for _ in dump.layers[0].blocks("preact", 50):
                pass


def test_integer_output_accepted_for_binary_kinds():
    z = np.array([[-1.0, 2.0], [3.0, -4.0]], np.float32)
    dump = dump_from_arrays({"b": {"activation": "threshold", "preact": z,
                                   "output": (z > 0).astype(np.int8)}})
    assert dump.layers[0].info.arrays["output"].dtype == "int8"


def test_layers_may_hold_different_sample_counts():
    """Documented: each layer keeps its own count; the dump's samples is the largest."""
    dump = dump_from_arrays({"a": {"preact": Z, "activation": "linear"},
                             "b": {"preact": Z[:6], "activation": "linear"}})
    assert [layer.info.samples for layer in dump.layers] == [10, 6]
    assert dump.samples == 10


@pytest.mark.parametrize("specs, fragment", [
    (["fc=nonsense"], "unknown activation 'nonsense'"),
    (["other=relu"], "does not hold"),
    (["relu", "tanh"], "more than one kind"),
])
def test_bad_activation_options(tmp_path, specs, fragment):
    path = tmp_path / "opts.h5"
    hdf5_file(path, {"fc": {"preact": Z}})
    with pytest.raises(errors.InvalidDump, match=fragment):
        open_dump(path, activations=specs)


def engine_ready() -> bool:
    try:
        return hasattr(importlib.import_module("actdoc.analysis"), "analyze")
    except ImportError:
        return False


@pytest.mark.skipif(not engine_ready(), reason="the analysis engine is not in the tree yet")
@pytest.mark.parametrize("case", ["shapes disagree", "not a dump", "truncated npz"])
def test_cli_exit_status_two_and_one_line(tmp_path, capsys, case):
    from actdoc.cli import main

    build, _, fragments = CASES[case]
    path = tmp_path / "bad_dump.bin"
    build(path)
    assert main(["check", str(path)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "Traceback" not in err
    assert all(fragment in err for fragment in fragments)
