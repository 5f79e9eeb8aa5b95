"""Helpers for the confinement and server tests: hostile files built from the demo dumps, a real
``actdoc serve`` process, and plain HTTP (http.client) uploads and reads."""

from __future__ import annotations

import http.client
import json
import os
import subprocess
import sys
import time
import uuid
from pathlib import Path

import numpy as np

from actdoc.io.writer import write_dump

REPO = Path(__file__).resolve().parents[2]
DEMO_DUMPS = REPO / "demo_models" / "dumps"
#: The one-byte change of issue 10: byte 2096 of this demo dump set to 0x52 makes HDF5 loop
#: inside an attribute read while holding the GIL (found by mutating the demo dumps).
HANG_SOURCE, HANG_OFFSET, HANG_BYTE = "relu_dying_step2.h5", 2096, 0x52


def hanging_dump(folder: Path) -> Path:
    data = bytearray((DEMO_DUMPS / HANG_SOURCE).read_bytes())
    assert data[HANG_OFFSET] != HANG_BYTE, "the demo dump changed: find the hanging byte anew"
    data[HANG_OFFSET] = HANG_BYTE
    path = Path(folder) / "hangs.h5"
    path.write_bytes(bytes(data))
    return path


def wide_dump(folder: Path, units: int = 1 << 18, samples: int = 4) -> Path:
    """A small file (8 MB) whose analysis keeps per-unit statistics for ``units`` units."""
    z = np.random.default_rng(3).normal(size=(samples, units)).astype(np.float32)
    return write_dump(Path(folder) / "wide.h5",
                      {"wide": {"activation": "relu", "preact": z, "output": np.maximum(z, 0)}})


def environment() -> dict[str, str]:
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(p for p in (str(REPO), env.get("PYTHONPATH")) if p)
    return env


def start_server(workspace: Path, *options: str) -> tuple[subprocess.Popen, str]:
    """``actdoc serve`` on a free loopback port in its own process; returns it and its URL."""
    process = subprocess.Popen(
        [sys.executable, "-m", "actdoc", "serve", "--port", "0", "--workspace", str(workspace),
         *options], stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True,
        env=environment())
    first = process.stdout.readline()
    if "http://" not in first:
        process.kill()
        raise AssertionError(f"actdoc serve did not start: {first!r}")
    return process, first.split("http://", 1)[1].split()[0].rstrip("/")


def multipart(path: Path, name: str | None = None) -> tuple[bytes, str]:
    boundary = uuid.uuid4().hex
    head = (f"--{boundary}\r\nContent-Disposition: form-data; name=\"file\"; "
            f"filename=\"{name or path.name}\"\r\nContent-Type: application/octet-stream\r\n\r\n")
    body = head.encode() + path.read_bytes() + f"\r\n--{boundary}--\r\n".encode()
    return body, f"multipart/form-data; boundary={boundary}"


def request(host: str, method: str, url: str, body: bytes | None = None,
            headers: dict | None = None, timeout: float = 30.0,
            chunked: bool = False) -> tuple[int, dict, bytes]:
    """One request on a fresh connection: (status, headers, body); ``chunked`` sends the body
    with chunked transfer coding (no Content-Length)."""
    address, port = host.rsplit(":", 1)
    connection = http.client.HTTPConnection(address, int(port), timeout=timeout)
    try:
        connection.request(method, url, body=iter([body]) if chunked else body,
                           headers=headers or {}, encode_chunked=chunked)
        response = connection.getresponse()
        return response.status, dict(response.getheaders()), response.read()
    finally:
        connection.close()


def upload(host: str, path: Path) -> tuple[int, dict]:
    body, content_type = multipart(path)
    status, _headers, data = request(host, "POST", "/api/dumps", body,
                                     {"Content-Type": content_type})
    return status, json.loads(data)


def wait_for(host: str, dump_id: str, timeout: float = 60.0) -> dict:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        status, _headers, data = request(host, "GET", f"/api/dumps/{dump_id}")
        body = json.loads(data)
        if body["status"] in ("ready", "failed"):
            return body
        time.sleep(0.1)
    raise AssertionError(f"{dump_id} still {body['status']} after {timeout} s")
