"""State dicts saved as safetensors, written by the safetensors package's own torch and numpy
APIs (``save_file``), read back equal; bad headers get one sentence and exit status 2."""

from __future__ import annotations

import json
import struct

import numpy as np
import pytest

safetensors_numpy = pytest.importorskip("safetensors.numpy", reason="the 'safetensors' package")

from actdoc.cli import main  # noqa: E402
from actdoc.errors import ActdocError  # noqa: E402
from actdoc.io import open_dump  # noqa: E402
from actdoc.model import ActivationKind  # noqa: E402

RNG = np.random.default_rng(12)


def test_torch_save_file_round_trip(tmp_path):
    torch = pytest.importorskip("torch", reason="PyTorch is the reference here (extra 'torch')")
    from safetensors.torch import save_file

    torch.manual_seed(2)
    nn = torch.nn
    # names whose alphabetical order is not the forward order; a BatchNorm's rank-1 weight
    # and its buffers are not layers of units (docs/contract.md section 3)
    model = nn.Sequential()
    model.add_module("input_proj", nn.Linear(10, 32))
    model.add_module("act", nn.ReLU())
    model.add_module("norm", nn.BatchNorm1d(32))
    model.add_module("hidden", nn.Linear(32, 24))
    model.add_module("classifier", nn.Linear(24, 4))
    path = tmp_path / "model.safetensors"
    save_file(model.state_dict(), str(path))
    with open_dump(path, activations=["relu"]) as dump:
        assert dump.format == "safetensors"
        assert [layer.name for layer in dump.layers] == ["input_proj", "hidden", "classifier"]
        assert [layer.info.kind for layer in dump.layers] == [
            ActivationKind.RELU, ActivationKind.RELU, ActivationKind.LINEAR]
        for layer in dump.layers:
            module = getattr(model, layer.name)
            np.testing.assert_array_equal(layer.weight(), module.weight.detach().numpy())
            np.testing.assert_array_equal(layer.bias(), module.bias.detach().numpy())
            assert layer.info.samples == 0


def test_numpy_save_file_dtypes_and_name_order(tmp_path):
    # equal widths: no unique chain, so natural name order ("fc2" before "fc10")
    arrays = {f"fc{i}.weight": RNG.normal(size=(8, 8)).astype(dtype)
              for i, dtype in ((1, np.float32), (2, np.float64), (10, np.float16))}
    arrays["fc2.bias"] = RNG.normal(size=8)
    path = tmp_path / "weights.safetensors"
    safetensors_numpy.save_file(arrays, str(path))
    with open_dump(path) as dump:
        assert [layer.name for layer in dump.layers] == ["fc1", "fc2", "fc10"]
        for layer in dump.layers:
            stored = arrays[f"{layer.name}.weight"]
            assert layer.info.arrays["weight"].dtype == str(stored.dtype)
            np.testing.assert_array_equal(layer.sources["weight"].read_all(), stored)
        np.testing.assert_array_equal(dump.layer("fc2").bias(), arrays["fc2.bias"])


def test_bfloat16_is_widened_exactly(tmp_path):
    torch = pytest.importorskip("torch", reason="PyTorch is the reference here (extra 'torch')")
    from safetensors.torch import save_file

    weight = torch.randn(5, 3).to(torch.bfloat16)
    save_file({"fc.weight": weight}, str(tmp_path / "bf16.safetensors"))
    with open_dump(tmp_path / "bf16.safetensors") as dump:
        np.testing.assert_array_equal(dump.layer("fc").weight(), weight.float().numpy())


def _raw(path, header: dict, data: bytes = b"") -> None:
    text = json.dumps(header).encode()
    path.write_bytes(struct.pack("<Q", len(text)) + text + data)


@pytest.mark.parametrize("header, data, message", [
    ({"fc.weight": {"dtype": "F32", "shape": [4, 4], "data_offsets": [0, 64]}}, b"\0" * 10,
     "fall outside the file"),
    ({"fc.weight": {"dtype": "F32", "shape": [4, 4], "data_offsets": [0, 60]}}, b"\0" * 60,
     "needs 64 bytes"),
    ({"fc.weight": {"dtype": "C64", "shape": [1], "data_offsets": [0, 8]}}, b"\0" * 8,
     "dtype C64 is not accepted"),
    ({"fc.weight": {"dtype": "F32", "shape": "x", "data_offsets": [0, 0]}}, b"",
     "invalid shape"),
    ({"other": {"dtype": "F32", "shape": [1], "data_offsets": [0, 4]}}, b"\0" * 4,
     "no tensors named <layer>.weight"),
])
def test_bad_files_get_one_sentence(tmp_path, capsys, header, data, message):
    path = tmp_path / "bad.safetensors"
    _raw(path, header, data)
    with pytest.raises(ActdocError, match=message):
        open_dump(path)
    assert main(["analyze", str(path)]) == 2
    err = capsys.readouterr().err
    assert message in err and "Traceback" not in err and err.count("\n") == 1


def test_truncated_header(tmp_path, capsys):
    path = tmp_path / "cut.safetensors"
    path.write_bytes(struct.pack("<Q", 5000) + b'{"fc.weight": ')
    assert main(["analyze", str(path)]) == 2
    assert "truncated" in capsys.readouterr().err
