"""Untrusted files are opened and analysed in a confined child process (docs/dashboard.md,
"Limits"): a file that hangs the readers or needs too much memory ends ``failed`` with one
sentence, attempts are counted, leftovers are cleaned at start, and the upload request itself
never runs the readers. OWASP: "Unrestricted File Upload" and "Denial of Service" cheat sheets
(bound what an uploaded file can cost the server)."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import textwrap
import time

import pytest

from actdoc.cli import main
from actdoc.confine import JobLimits
from actdoc.io.limits import ReadLimits
from actdoc.web import create_app
from actdoc.workspace import MAX_ATTEMPTS, Workspace
from tests.support.confine import environment, hanging_dump, wide_dump
from tests.support.web import post_file, wait_until_done

#: A short check limit keeps the hanging case quick; the margin covers a loaded machine.
CHECK_SECONDS = 3.0
MARGIN_SECONDS = 12.0


def test_a_file_that_hangs_the_readers_fails_within_the_check_limit(tmp_path):
    store = Workspace(tmp_path / "ws", job_limits=JobLimits(check_seconds=CHECK_SECONDS))
    record, _ = store.ingest_path(hanging_dump(tmp_path))
    started = time.monotonic()
    done = store.analyse(record.id)
    took = time.monotonic() - started
    assert done.status == "failed"
    assert done.error == (f"hangs.h5: took longer than {CHECK_SECONDS:g} s to check; "
                          f"it may be malformed")
    assert CHECK_SECONDS <= took < CHECK_SECONDS + MARGIN_SECONDS
    assert list((store.root / "tmp").iterdir()) == []


def test_a_file_that_needs_too_much_memory_fails_with_the_memory_sentence(tmp_path):
    # 2^18 units x (moments + a histogram each): far past 64 MB of working memory, while the
    # same file analyses with the default 4096 MB (the generous ReadLimits() let it be read).
    path = wide_dump(tmp_path)
    tight = Workspace(tmp_path / "tight", read_limits=ReadLimits(),
                      job_limits=JobLimits(memory_mb=64))
    record, _ = tight.ingest_path(path)
    done = tight.analyse(record.id)
    assert done.status == "failed"
    assert done.error == "wide.h5: needed more than 64 MB to analyse; it may be malformed"
    roomy = Workspace(tmp_path / "roomy", read_limits=ReadLimits())
    record, _ = roomy.ingest_path(path)
    assert roomy.analyse(record.id).status == "ready"


def test_a_child_that_dies_is_retried_then_failed_after_the_attempts(tmp_path):
    store = Workspace(tmp_path / "ws", job_limits=JobLimits(check_seconds=120))
    record, _ = store.ingest_path(hanging_dump(tmp_path))
    store.start()
    killed = set()
    deadline = time.monotonic() + 60
    while len(killed) < MAX_ATTEMPTS and time.monotonic() < deadline:
        current = store.runner.current
        if current is not None and current[1].pid not in killed:
            killed.add(current[1].pid)
            os.kill(current[1].pid, signal.SIGKILL)
        time.sleep(0.05)
    while store.get(record.id).status != "failed" and time.monotonic() < deadline:
        time.sleep(0.05)
    done = store.get(record.id)
    assert done.status == "failed" and done.attempts == MAX_ATTEMPTS
    assert done.error == ("hangs.h5: the process that had to check it stopped without an "
                          "answer (signal 9 (SIGKILL)); it may be malformed")


def test_removing_a_dump_stops_its_check(tmp_path):
    store = Workspace(tmp_path / "ws", job_limits=JobLimits(check_seconds=120))
    record, _ = store.ingest_path(hanging_dump(tmp_path))
    store.start()
    deadline = time.monotonic() + 60
    while store.runner.current is None:
        assert time.monotonic() < deadline
        time.sleep(0.05)
    child = store.runner.current[1]
    store.delete(record.id)
    child.wait(timeout=30)  # killed, not left to run out its 120 s
    assert store.list() == [] and list((store.root / "dumps").iterdir()) == []


SERVER_THAT_GETS_KILLED = textwrap.dedent("""
    import sys, time
    from actdoc.confine import JobLimits
    from actdoc.workspace import Workspace
    Workspace(sys.argv[1], job_limits=JobLimits(check_seconds=120)).start()
    time.sleep(120)
""")


def test_a_dump_that_kills_the_server_is_not_requeued_forever(tmp_path):
    """The server itself is killed mid-check three times (as by the kernel's OOM killer): the
    fourth start fails the dump with one sentence instead of trying again."""
    root = tmp_path / "ws"
    record, _ = Workspace(root).ingest_path(hanging_dump(tmp_path))
    for attempt in range(1, MAX_ATTEMPTS + 1):
        server = subprocess.Popen([sys.executable, "-c", SERVER_THAT_GETS_KILLED, str(root)],
                                  env=environment())
        try:
            deadline = time.monotonic() + 60
            while Workspace(root).get(record.id).attempts < attempt:
                assert time.monotonic() < deadline and server.poll() is None
                time.sleep(0.1)
        finally:
            server.kill()
            server.wait()
    restarted = Workspace(root)
    restarted.start()
    done = restarted.get(record.id)
    assert done.status == "failed" and done.attempts == MAX_ATTEMPTS
    assert done.error == (f"hangs.h5: the analysis was started {MAX_ATTEMPTS} times and never "
                          f"finished; it is not tried again")


def test_leftovers_of_a_killed_run_are_removed_at_start(tmp_path, planted_dump):
    root = tmp_path / "ws"
    first = Workspace(root)
    kept, _ = first.ingest_path(planted_dump)
    first.close()
    spool = root / "tmp" / "upload-abc123"
    spool.mkdir()
    (spool / "half.h5").write_bytes(b"\x89HDF\r\n\x1a\n" + bytes(100))
    (root / "tmp" / "findings-xyz").mkdir()
    (root / "tmp" / "findings-xyz" / "arrays.npz").write_bytes(b"PK")
    orphan = root / "dumps" / ("0" * 64)  # moved in, then killed before its row was written
    orphan.mkdir()
    (orphan / "lost.h5").write_bytes(b"x")
    (root / "findings" / ("1" * 64)).mkdir()

    again = Workspace(root)
    assert list((root / "tmp").iterdir()) == []
    assert sorted(p.name for p in (root / "dumps").iterdir()) == [kept.sha256]
    assert list((root / "findings").iterdir()) == []
    assert again.dump_path(again.get(kept.id)).read_bytes() == planted_dump.read_bytes()
    # A second workspace on the folder while this one is open leaves its tmp/ alone.
    (root / "tmp" / "upload-busy").mkdir()
    assert not Workspace(root).cleaned
    assert (root / "tmp" / "upload-busy").is_dir()


def test_the_upload_request_never_runs_the_readers(workspace_dir, planted_dump, monkeypatch):
    """Checking happens in the background (issue: 5,000 tiny layers took 5 s inside the
    request): with every reader made to fail in this process, the upload still answers 201
    queued, and the child's own readers then make the dump ready."""
    import actdoc.io as io_package

    app = create_app(workspace_dir)
    client = app.test_client()

    def refuse(*_args, **_kwargs):
        raise AssertionError("a reader ran inside the upload request")

    monkeypatch.setattr(io_package, "open_dump", refuse)
    for reader in io_package.READERS:
        monkeypatch.setattr(reader, "read", refuse)
    started = time.monotonic()
    response = post_file(client, planted_dump)
    print(f"upload of {planted_dump.stat().st_size} bytes answered in "
          f"{1000 * (time.monotonic() - started):.0f} ms")
    body = response.get_json()
    assert response.status_code == 201 and body["status"] == "queued"
    assert body["layers"] is None and body["samples"] is None  # not read yet
    assert body["checked"] is False and body["stage"] == "waiting to be checked"
    done = wait_until_done(client, body["id"])
    assert done["status"] == "ready" and done["layers"] == 3 and done["samples"] == 240


def test_uploads_are_read_under_the_upload_limits(workspace_dir, tmp_path, planted_dump):
    """create_app's read limits reach the readers in the child: an NPZ member larger than
    ``member_bytes`` is refused with the readers' sentence naming the file and the limit."""
    from actdoc.io.writer import write_npz
    from tests.support.web import planted_layers

    npz = write_npz(tmp_path / "planted.npz", planted_layers())
    client = create_app(workspace_dir, read_limits=ReadLimits(member_bytes=1000)).test_client()
    done = wait_until_done(client, post_file(client, npz).get_json()["id"])
    assert done["status"] == "failed" and done["error"].startswith("planted.npz")
    assert "limit of 1000 bytes" in done["error"]
    # The same file under the default upload limits is read and analysed.
    roomy = create_app(tmp_path / "roomy").test_client()
    assert wait_until_done(roomy, post_file(roomy, npz).get_json()["id"])["status"] == "ready"


def test_the_command_line_offers_the_same_limits(tmp_path, capsys):
    hang = hanging_dump(tmp_path)
    assert main(["analyze", str(hang), "--time-limit", "2"]) == 2
    out, err = capsys.readouterr()
    assert out == ""
    assert err == "actdoc: hangs.h5: took longer than 2 s to check; it may be malformed\n"
    assert main(["check", str(wide_dump(tmp_path)), "--memory-limit", "64"]) == 2
    assert capsys.readouterr().err == ("actdoc: wide.h5: needed more than 64 MB to analyse; "
                                       "it may be malformed\n")


@pytest.mark.parametrize("fmt", ["json", "csv"])
def test_a_confined_analysis_equals_the_plain_one(tmp_path, capsys, fmt):
    from tests.support.confine import DEMO_DUMPS

    path = DEMO_DUMPS / "logistic_near_binary.h5"
    assert main(["analyze", str(path), "--format", fmt]) == 0
    plain = capsys.readouterr().out
    assert main(["analyze", str(path), "--format", fmt, "--time-limit", "120",
                 "--memory-limit", "2048"]) == 0
    assert capsys.readouterr().out == plain


def test_serve_options_reach_the_app(monkeypatch, capsys):
    """``serve`` takes the size-limit options of ``analyze`` and ``check`` under the same
    names, with the upload limits as their defaults."""
    import actdoc.web

    seen = {}
    monkeypatch.setattr(actdoc.web, "serve", lambda **kwargs: seen.update(kwargs))
    assert main(["serve"]) == 0
    assert seen["read_limits"] == ReadLimits.for_uploads()
    assert main(["serve", "--max-upload", "5", "--check-time", "7", "--analysis-time", "90",
                 "--memory-limit", "300", "--max-units", "none", "--max-weight-bytes", "1K",
                 "--max-total-bytes", "3G", "--max-member-bytes", "500M", "--no-check-slot",
                 "--analysis-slots", "2"]) == 0
    assert seen["max_upload_bytes"] == 5 * 1024**2
    assert seen["check_slot"] is False and seen["analysis_slots"] == 2
    assert seen["job_limits"] == JobLimits(check_seconds=7, analysis_seconds=90, memory_mb=300)
    assert seen["read_limits"] == ReadLimits(member_bytes=500 * 1024**2,
                                             total_bytes=3 * 1024**3,
                                             units_per_layer=None, weight_bytes=1024)
    # The same names as analyze/check; the earlier --read-limit NAME=VALUE is gone.
    for command in ("analyze", "check", "serve"):
        assert "--max-weight-bytes SIZE" in capture_help(command, capsys)
    with pytest.raises(SystemExit) as refused:
        main(["serve", "--read-limit", "weight_bytes=1024"])
    assert refused.value.code == 2
    with pytest.raises(SystemExit) as refused:
        main(["serve", "--max-units", "many"])
    assert refused.value.code == 2
    assert "'many' is not a positive whole number" in capsys.readouterr().err
    assert main(["serve", "--analysis-slots", "0"]) == 2


def capture_help(command: str, capsys) -> str:
    with pytest.raises(SystemExit):
        main([command, "--help"])
    return capsys.readouterr().out


def test_the_confined_command_line_reads_under_its_size_options(tmp_path, planted_dump,
                                                                capsys):
    """``--time-limit`` moves the reading into the child; the size options go with it, so a
    refusal reads the same with and without confinement (the planted layers have 24, 16 and
    3 units: --max-units 20 refuses hidden1)."""
    common = ["check", str(planted_dump), "--max-units", "20"]
    assert main(common) == 2
    plain = capsys.readouterr().err
    assert "layer 'hidden1'" in plain and "limit of 20 units per layer" in plain
    assert main(common + ["--time-limit", "120"]) == 2
    assert capsys.readouterr().err == plain
    assert main(["check", str(planted_dump), "--max-units", "24", "--time-limit", "120"]) != 2
