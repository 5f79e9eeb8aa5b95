"""Odd but possible files reach the command line as one sentence and exit status 2.

Each file is built with plain h5py, numpy or the operating system (a FIFO), breaking one rule of
docs/contract.md sections 1-2 in a way the ordinary validation cases do not cover. The rule tested
is the project's own (every input error is one sentence, never a traceback or a hang).
"""

from __future__ import annotations

import os
import threading

import h5py
import numpy as np
import pytest

from actdoc import errors
from actdoc.cli import main
from actdoc.io import open_dump

Z = np.linspace(-2, 2, 40, dtype=np.float32).reshape(10, 4)


def one_line_status_two(capsys, *argv: str) -> str:
    """Run the command line; assert exit 2 and a single stderr line; return that line."""
    assert main(list(argv)) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "Traceback" not in err
    return err


def test_dataset_with_an_empty_dataspace_is_refused(tmp_path, capsys):
    """h5py.Empty writes a dataset with a null dataspace: it has no shape at all."""
    path = tmp_path / "nullspace.h5"
    with h5py.File(path, "w") as f:
        f.create_group("layers/fc").create_dataset("preact", data=h5py.Empty("f4"))
    with pytest.raises(errors.InvalidDump, match=r"^nullspace\.h5, layer 'fc', array 'preact': "
                                                 r".*no shape"):
        open_dump(path)
    assert "array 'preact'" in one_line_status_two(capsys, "analyze", str(path))


@pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="named pipes need a POSIX system")
def test_named_pipe_is_refused_without_waiting_for_a_writer(tmp_path):
    """Opening a FIFO for reading blocks until something writes; a dump must be a file."""
    path = tmp_path / "pipe.h5"
    os.mkfifo(path)
    outcome: list[BaseException | None] = []

    def attempt() -> None:
        try:
            open_dump(path)
            outcome.append(None)
        except BaseException as exc:  # recorded for the main thread
            outcome.append(exc)

    worker = threading.Thread(target=attempt, daemon=True)
    worker.start()
    worker.join(10)
    if worker.is_alive():  # unblock the reader so the thread can end, then fail
        fd = os.open(path, os.O_WRONLY | os.O_NONBLOCK)
        os.close(fd)
        pytest.fail("open_dump waited on a named pipe")
    assert isinstance(outcome[0], errors.UnreadableDump)
    assert str(outcome[0]) == "pipe.h5: is not a regular file; a dump must be a file on disk"


def test_order_too_large_for_a_float_is_one_sentence(tmp_path, capsys):
    """JSON integers have no size limit; float() of one with 400 digits overflows."""
    path = tmp_path / "huge_order.npz"
    meta = '{"layers": [{"name": "fc", "order": ' + "9" * 400 + "}]}"
    np.savez(path, **{"fc/preact": Z, "actdoc_meta": np.array(meta)})
    with pytest.raises(errors.InvalidDump, match=r"layer 'fc': attribute 'order' must be an "
                                                 r"integer"):
        open_dump(path)
    one_line_status_two(capsys, "analyze", str(path))


@pytest.mark.parametrize("value", [True, np.bool_(False)], ids=["python", "numpy"])
def test_boolean_order_is_not_an_integer(tmp_path, value):
    """A flag is not a position in the forward pass (docs/contract.md section 1: an integer)."""
    path = tmp_path / "flag.h5"
    with h5py.File(path, "w") as f:
        group = f.create_group("layers/fc")
        group.create_dataset("preact", data=Z)
        group.attrs["order"] = value
    with pytest.raises(errors.InvalidDump, match=r"layer 'fc': attribute 'order' must be an "
                                                 r"integer, found (True|False)"):
        open_dump(path)


@pytest.mark.parametrize("order", ["first", np.array([1, 2])], ids=["text", "array"])
def test_bad_order_with_activation_option_is_one_sentence(tmp_path, capsys, order):
    """--activation orders the layers before assembly; a bad order must not escape as a
    ValueError there."""
    path = tmp_path / "ordered.h5"
    with h5py.File(path, "w") as f:
        for name in ("a", "b"):
            group = f.create_group(f"layers/{name}")
            group.create_dataset("preact", data=Z)
            group.attrs["order"] = order
    with pytest.raises(errors.InvalidDump, match=r"layer 'a': attribute 'order'"):
        open_dump(path, activations=["relu"])
    one_line_status_two(capsys, "analyze", str(path), "--activation", "relu")


def test_a_huge_declared_but_unwritten_hdf5_dataset_is_refused_quickly(tmp_path):
    # A chunked dataset declared at 10^12 x 10^6 float32 with nothing written would make a pass
    # read fill values for ever; deflate packs at most ~1032:1 (zlib's documented limit), so
    # storage this far below the declared size means the data was never written.
    import time

    import h5py

    from actdoc.errors import InvalidDump
    from actdoc.io import open_dump

    path = tmp_path / "bomb.h5"
    with h5py.File(path, "w") as f:
        g = f.create_group("layers/h")
        g.attrs["activation"] = "relu"
        g.create_dataset("preact", shape=(10**12, 10**6), dtype="f4", chunks=(1024, 256))
    started = time.monotonic()
    with pytest.raises(InvalidDump, match=r"bomb\.h5, layer 'h', array 'preact': declares .* "
                                          r"never written"):
        open_dump(path)
    assert time.monotonic() - started < 10


def test_a_dead_layer_compressed_with_gzip_is_still_read(tmp_path):
    # The counterpart: an all-zero layer (every relu unit dead) legitimately compresses very well.
    import h5py
    import numpy as np

    from actdoc.io import open_dump

    path = tmp_path / "dead.h5"
    with h5py.File(path, "w") as f:
        g = f.create_group("layers/h")
        g.attrs["activation"] = "relu"
        g.create_dataset("output", data=np.zeros((20000, 1024), "f4"), chunks=(1024, 256),
                         compression="gzip", compression_opts=9)
    with open_dump(path) as dump:
        assert dump.layers[0].info.units == 1024


def test_an_npz_layer_with_an_empty_name_is_refused(tmp_path):
    # docs/contract.md section 2: arrays are named "<layer>/preact"; "/preact" names no layer.
    import numpy as np

    from actdoc.errors import InvalidDump
    from actdoc.io import open_dump

    path = tmp_path / "noname.npz"
    np.savez(path, **{"/preact": np.zeros((4, 2), "f4")})
    with pytest.raises(InvalidDump, match=r"noname\.npz: a layer has an empty name"):
        open_dump(path)
