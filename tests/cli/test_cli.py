"""The command line of docs/contract.md section 5: formats, the pipeline gate and exit statuses.

Dumps here are written with plain h5py straight from docs/contract.md section 1, so the command is
checked against the published layout rather than against actdoc's own writer. Ground truth for
the planted units is by construction: a relu unit whose total input is negative on every sample
never fires (the definition of a dead unit, common practice).
"""

from __future__ import annotations

import csv
import io
import json
import subprocess
import sys

import h5py
import numpy as np
import pytest

from actdoc.cli import main

DEAD = [1, 4, 6, 7]  # more than half of 8 units: a critical finding


def _write(path, dead=(), units=8, samples=256, seed=0):
    rng = np.random.default_rng(seed)
    z = rng.normal(0.0, 1.0, (samples, units)).astype(np.float32)
    z[:, list(dead)] = -np.abs(z[:, list(dead)]) - 0.5
    with h5py.File(path, "w") as f:
        # Creation order is tracked, so it is the forward order (docs/contract.md section 1).
        layers = f.create_group("layers", track_order=True)
        g = layers.create_group("hidden")
        g.attrs["activation"] = "relu"
        g.create_dataset("preact", data=z)
        g.create_dataset("output", data=np.maximum(z, 0))
        out = layers.create_group("head")
        out.attrs["activation"] = "linear"
        zo = rng.normal(0.0, 1.0, (samples, 2)).astype(np.float32)
        out.create_dataset("preact", data=zo)
        out.create_dataset("output", data=zo)
    return path


@pytest.fixture
def sick(tmp_path):
    return _write(tmp_path / "sick.h5", dead=DEAD)


@pytest.fixture
def fit(tmp_path):
    return _write(tmp_path / "fit.h5")


def run(capsys, *argv):
    status = main(list(argv))
    out, err = capsys.readouterr()
    return status, out, err


def test_analyze_json_names_the_dead_units(capsys, sick):
    status, out, err = run(capsys, "analyze", str(sick), "--format", "json")
    assert status == 0 and err == ""  # no progress bar when stderr is not a terminal
    doc = json.loads(out)
    assert doc["schema"] == "actdoc.findings/1"
    assert doc["source"]["file"] == "sick.h5" and doc["source"]["format"] == "hdf5"
    assert [layer["name"] for layer in doc["layers"]] == ["hidden", "head"]
    dead = [f for f in doc["findings"] if f["check"] == "dead"]
    assert len(dead) == 1 and dead[0]["units"] == DEAD and dead[0]["layer"] == "hidden"
    assert dead[0]["severity"] == "critical"
    assert doc["layers"][0]["fractions"]["dead"] == pytest.approx(len(DEAD) / 8)


def test_analyze_csv_md_text(capsys, sick):
    status, out, _ = run(capsys, "analyze", str(sick), "--format", "csv")
    rows = [r for r in csv.DictReader(io.StringIO(out)) if r["check"] == "dead"]
    assert status == 0 and [int(r["unit"]) for r in rows] == DEAD
    for fmt in ("md", "text"):
        status, out, _ = run(capsys, "analyze", str(sick), "--format", fmt)
        assert status == 0 and "dead" in out and "probe batch" in out


def test_output_file_is_written(capsys, sick, tmp_path):
    target = tmp_path / "report.json"
    status, out, _ = run(capsys, "analyze", str(sick), "--format", "json", "--output",
                         str(target))
    assert status == 0 and out == ""
    assert json.loads(target.read_text())["schema"] == "actdoc.findings/1"


def test_check_gate_levels(capsys, sick, fit):
    assert run(capsys, "check", str(sick))[0] == 1
    assert run(capsys, "check", str(sick), "--fail-on", "warning")[0] == 1
    status, out, _ = run(capsys, "check", str(fit), "--fail-on", "critical")
    assert status == 0 and "nothing at or above critical" in out


@pytest.mark.parametrize("make, message", [
    (lambda p: p, "no such file"),
    (lambda p: (p.write_bytes(b"plain text, not a dump\n"), p)[1], "neither HDF5, NPZ nor safetensors"),
])
def test_bad_input_is_one_line_and_status_2(capsys, tmp_path, make, message):
    path = make(tmp_path / "bad.h5")
    status, out, err = run(capsys, "analyze", str(path))
    assert status == 2 and out == ""
    assert err.count("\n") == 1 and "bad.h5" in err and "Traceback" not in err
    assert message in err


def test_unknown_setting_is_status_2(capsys, sick):
    status, _, err = run(capsys, "analyze", str(sick), "--set", "no_such_threshold=3")
    assert status == 2 and "no_such_threshold" in err and err.count("\n") == 1


def test_unwritable_output_keeps_status_2_and_old_file(capsys, sick, tmp_path):
    status, _, err = run(capsys, "analyze", str(sick), "--output",
                         str(tmp_path / "missing-folder" / "r.txt"))
    assert status == 2 and "cannot write" in err


def test_console_script_has_no_traceback_on_bad_input(tmp_path):
    bad = tmp_path / "bad.npz"
    bad.write_bytes(b"PK\x03\x04 truncated")
    proc = subprocess.run([sys.executable, "-m", "actdoc", "check", str(bad)],
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 2
    assert "Traceback" not in proc.stderr and "bad.npz" in proc.stderr
    assert len(proc.stderr.strip().splitlines()) == 1


def test_compare_names_the_units_that_died_between_checkpoints(capsys, tmp_path):
    # Ground truth by construction: units planted dead in the later dump only.
    early = _write(tmp_path / "early.h5", dead=[1])
    late = _write(tmp_path / "late.h5", dead=[1, 4, 6])
    status, out, _ = run(capsys, "compare", str(early), str(late), "--format", "json")
    assert status == 0
    step = json.loads(out)["steps"][0]
    became_dead = [c for c in step["changes"] if c["after"] == "dead" and c["before"] is None]
    assert [c["units"] for c in became_dead] == [[4, 6]]
    status, out, _ = run(capsys, "compare", str(early), str(late))
    assert status == 0 and "hidden: 2 units became dead: 4, 6" in out


def test_compare_refuses_different_models(capsys, tmp_path):
    a = _write(tmp_path / "a.h5", units=8)
    b = _write(tmp_path / "b.h5", units=6)
    status, _, err = run(capsys, "compare", str(a), str(b))
    assert status == 2 and "cannot be compared" in err and err.count("\n") == 1


def test_serve_on_a_taken_port_is_one_line(capsys, tmp_path):
    import socket

    with socket.socket() as taken:
        taken.bind(("127.0.0.1", 0))
        taken.listen()
        port = taken.getsockname()[1]
        status, _, err = run(capsys, "serve", "--port", str(port), "--workspace",
                             str(tmp_path / "ws"))
    assert status == 2 and "cannot serve the dashboard" in err and err.count("\n") == 1


def test_serve_with_an_unusable_workspace_is_one_line(capsys, tmp_path):
    blocker = tmp_path / "a-file"
    blocker.write_text("not a folder")
    status, _, err = run(capsys, "serve", "--workspace", str(blocker / "ws"), "--port", "0")
    assert status == 2 and "cannot use the workspace folder" in err and err.count("\n") == 1
    assert blocker.read_text() == "not a folder"


def test_progress_bar_draws_on_a_terminal_only():
    from actdoc.cli import ProgressBar

    class Terminal(io.StringIO):
        def isatty(self):
            return True

    shown, hidden = Terminal(), io.StringIO()
    for stream in (shown, hidden):
        bar = ProgressBar("analysing", stream=stream)
        for step in range(11):
            bar(step / 10)
    assert hidden.getvalue() == ""
    drawn = shown.getvalue()
    assert drawn.startswith("\ranalysing [") and "100.0%" in drawn and drawn.endswith("\n")


def test_only_outputs_that_show_the_digest_hash_the_dump(tmp_path, capsys, monkeypatch):
    """JSON carries the file's SHA-256 (reference: hashlib over the bytes); the text report,
    CSV and the gate never show it, so they must not spend a pass hashing the file."""
    import hashlib

    import actdoc.digest

    path = tmp_path / "d.h5"
    _write(path, dead=DEAD)
    assert main(["analyze", str(path), "--format", "json"]) == 0
    document = json.loads(capsys.readouterr().out)
    assert document["source"]["sha256"] == hashlib.sha256(path.read_bytes()).hexdigest()

    def no_hashing(*args, **kwargs):
        raise AssertionError("the dump was hashed")

    monkeypatch.setattr(actdoc.digest, "file_sha256", no_hashing)
    monkeypatch.setattr("actdoc.analysis.engine.file_sha256", no_hashing)
    assert main(["analyze", str(path)]) == 0
    assert main(["analyze", str(path), "--format", "csv"]) == 0
    assert main(["check", str(path)]) == 1
    assert "hidden" in capsys.readouterr().out


def test_a_dump_that_cannot_be_hashed_is_one_sentence(tmp_path, capsys, monkeypatch):
    import actdoc.digest

    path = tmp_path / "d.h5"
    _write(path)

    def refuse(*args, **kwargs):
        raise PermissionError(13, "Permission denied")

    monkeypatch.setattr(actdoc.digest, "file_sha256", refuse)
    assert main(["analyze", str(path), "--format", "json"]) == 2
    err = capsys.readouterr().err.strip()
    assert err == "actdoc: d.h5: cannot be read to compute its SHA-256 (Permission denied)"
