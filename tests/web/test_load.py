"""A load run against a real ``actdoc serve`` (waitress, its own process, 127.0.0.1): 8 uploaders
and 32 readers, bounded in count and time, while one upload is a file that hangs the readers.

Asserts 0 errors, every upload present once (the same bytes twice are one dump, docs/dashboard.md),
findings equal to ``actdoc analyze`` of the same file, and that the file that hangs is failed
with its sentence. Prints the p99 read latency, overall and while the hanging file was being
checked (recorded in docs/dashboard.md; the timing itself is not asserted beyond "the server
was never frozen for the whole check window", which is what in-process checking did)."""

from __future__ import annotations

import json
import threading
import time

import numpy as np
import pytest

from actdoc.cli import main
from tests.support.confine import (DEMO_DUMPS, hanging_dump, request, start_server, upload,
                                   wait_for)

UPLOADERS, READERS = 8, 32
READS_PER_READER = 80
TIME_CAP_SECONDS = 120.0
CHECK_SECONDS = 6
FILES = ("healthy_baseline.h5", "logistic_deep_old_init.h5", "logistic_near_binary.h5",
         "relu_dying_step1.h5", "relu_dying_step3.h5", "relu_dying_step4.h5",
         "relu_high_rate.h5", "tanh_raw_inputs.h5")


def percentile(values: list[float], share: float) -> float:
    return float(np.percentile(values, share)) if values else float("nan")


@pytest.mark.slow
def test_eight_uploaders_and_thirty_two_readers_against_a_real_server(tmp_path, capsys):
    hang = hanging_dump(tmp_path)
    server, host = start_server(tmp_path / "ws", "--check-time", str(CHECK_SECONDS))
    errors: list[str] = []
    reads: list[tuple[float, float]] = []  # (start, seconds)
    uploads: dict[str, list[str]] = {}  # file name -> ids answered
    ready_ids: list[str] = []
    hang_window: list[float] = []
    stop = threading.Event()
    started = time.monotonic()
    lock = threading.Lock()

    def reader(number: int) -> None:
        for turn in range(READS_PER_READER):
            if stop.is_set() or time.monotonic() - started > TIME_CAP_SECONDS:
                return
            with lock:
                ids = list(ready_ids)
            url = ("/", "/api/dumps")[turn % 2]
            if ids and turn % 3 == 2:
                url = f"/dumps/{ids[(number + turn) % len(ids)]}"
            began = time.monotonic()
            try:
                status, _headers, _body = request(host, "GET", url, timeout=30)
            except OSError as error:
                errors.append(f"GET {url}: {error}")
                continue
            with lock:
                reads.append((began, time.monotonic() - began))
            if status != 200:
                errors.append(f"GET {url}: {status}")
            time.sleep(0.05)

    def uploader(number: int) -> None:
        mine = [DEMO_DUMPS / FILES[number], DEMO_DUMPS / FILES[(number + 1) % UPLOADERS]]
        if number == 0:
            mine.insert(0, hang)
        for path in mine:
            try:
                status, body = upload(host, path)
            except OSError as error:
                errors.append(f"upload {path.name}: {error}")
                continue
            if status != 201 or body["status"] not in ("queued", "analysing", "ready",
                                                         "failed"):
                errors.append(f"upload {path.name}: {status} {body}")
                continue
            with lock:
                uploads.setdefault(path.name, []).append(body["id"])
            if path == hang:
                hang_window.append(time.monotonic())

    threads = [threading.Thread(target=reader, args=(n,)) for n in range(READERS)]
    threads += [threading.Thread(target=uploader, args=(n,)) for n in range(UPLOADERS)]
    try:
        for thread in threads:
            thread.start()
        outcomes = {}
        for name in [hang.name, *FILES]:
            deadline = started + TIME_CAP_SECONDS
            while name not in uploads and time.monotonic() < deadline:
                time.sleep(0.05)
            assert name in uploads, f"{name} was never answered"
            outcomes[name] = wait_for(host, uploads[name][0],
                                      timeout=max(1.0, deadline - time.monotonic()))
            if name == hang.name:
                hang_window.append(time.monotonic())
            with lock:
                ready_ids.extend([outcomes[name]["id"]] if outcomes[name]["status"] == "ready"
                                 else [])
        stop.set()
        for thread in threads:
            thread.join(TIME_CAP_SECONDS)
        listed = json.loads(request(host, "GET", "/api/dumps")[2])
        served = {name: json.loads(request(host, "GET",
                                           f"/api/dumps/{outcomes[name]['id']}/findings.json")[2])
                  for name in FILES}
    finally:
        stop.set()
        server.terminate()
        server.wait(30)

    assert errors == []
    # Every upload present once: one dump per distinct file, every answer naming it.
    assert sorted(d["name"] for d in listed) == sorted([hang.name, *FILES])
    for name, ids in uploads.items():
        assert len(set(ids)) == 1, name
    assert len(uploads[FILES[0]]) == 2  # uploaded by two uploaders, stored once
    assert outcomes[hang.name]["status"] == "failed"
    assert outcomes[hang.name]["error"] == (f"hangs.h5: took longer than {CHECK_SECONDS} s to "
                                            f"check; it may be malformed")
    for name in FILES:
        assert outcomes[name]["status"] == "ready", outcomes[name]
        assert main(["analyze", str(DEMO_DUMPS / name), "--format", "json"]) == 0
        assert served[name] == json.loads(capsys.readouterr().out), name

    during = [seconds for began, seconds in reads
              if hang_window[0] <= began <= hang_window[-1]]
    overall = percentile([seconds for _began, seconds in reads], 99)
    while_hanging = percentile(during, 99)
    with capsys.disabled():
        print(f"\nload: {len(reads)} reads, p99 {1000 * overall:.0f} ms; {len(during)} reads "
              f"while the hanging file was checked, p99 {1000 * while_hanging:.0f} ms; "
              f"{sum(len(v) for v in uploads.values())} uploads; "
              f"{time.monotonic() - started:.1f} s")
    assert len(during) > READERS  # the readers really ran while the file hung
    # In-process checking froze every request for the whole check window.
    assert while_hanging < CHECK_SECONDS / 2
