"""One upload limit, answered as JSON 413 by a real waitress server whichever layer sees the body
first (docs/dashboard.md, "Limits"). RFC 9110 section 15.5.14: 413 Content Too Large, after
which the server may close the connection."""

from __future__ import annotations

import json
import socket
import threading

import pytest

from actdoc.web import create_app
from actdoc.web.headers import SECURITY_HEADERS
from actdoc.web.server import create_server
from tests.support.confine import request
from tests.support.web import stop_server

LIMIT = 1024 * 1024


@pytest.fixture(scope="module")
def live(tmp_path_factory):
    """A dashboard with a 1 MiB upload limit, served by waitress on a free loopback port."""
    app = create_app(tmp_path_factory.mktemp("limit-workspace"), max_upload_bytes=LIMIT)
    server = create_server(app, host="127.0.0.1", port=0, threads=2)
    thread = threading.Thread(target=server.run, daemon=True)
    thread.start()
    yield f"127.0.0.1:{server.effective_port}", app.extensions["actdoc"].workspace
    stop_server(server)


def body_of(size: int, name: str = "big.h5") -> tuple[bytes, str]:
    boundary = "limitboundary"
    head = (f"--{boundary}\r\nContent-Disposition: form-data; name=\"file\"; "
            f"filename=\"{name}\"\r\n\r\n").encode()
    data = head + b"\x89HDF\r\n\x1a\n" + bytes(size - 8) + f"\r\n--{boundary}--\r\n".encode()
    return data, f"multipart/form-data; boundary={boundary}"


def assert_json_413(status: int, headers: dict, data: bytes) -> str:
    assert status == 413
    assert headers["Content-Type"].startswith("application/json")
    message = json.loads(data)["error"]
    assert "1 MiB" in message
    return message


def test_a_declared_body_far_past_the_limit_is_refused_by_waitress_as_json(live):
    host, workspace = live
    # Only the headers are sent: waitress refuses from Content-Length before any body byte.
    address, port = host.split(":")
    with socket.create_connection((address, int(port)), timeout=10) as sock:
        sock.sendall(b"POST /api/dumps HTTP/1.1\r\nHost: " + host.encode()
                     + b"\r\nContent-Type: multipart/form-data; boundary=x\r\n"
                     + b"Content-Length: 5000000000\r\n\r\n")
        answer = b""
        while chunk := sock.recv(65536):
            answer += chunk
    head, _, data = answer.partition(b"\r\n\r\n")
    lines = head.decode().split("\r\n")
    headers = dict(line.split(": ", 1) for line in lines[1:])
    message = assert_json_413(int(lines[0].split()[1]), headers, data)
    assert message == "the request passes the dashboard's upload limit of 1 MiB"
    # waitress's own answer carries the security headers of every other answer.
    for name, value in SECURITY_HEADERS.items():
        assert headers[name] == value
    assert list((workspace.root / "tmp").iterdir()) == []


def test_a_chunked_body_past_the_limit_is_refused_as_json(live):
    host, _workspace = live
    data, content_type = body_of(2 * LIMIT)
    status, headers, answer = request(host, "POST", "/api/dumps", data,
                                      {"Content-Type": content_type}, chunked=True)
    assert_json_413(status, headers, answer)
    for name, value in SECURITY_HEADERS.items():
        assert headers[name] == value


def test_a_file_just_past_the_limit_is_refused_by_the_app_as_json(live):
    host, workspace = live
    data, content_type = body_of(LIMIT + 1000)  # inside waitress's slack for multipart headers
    status, headers, answer = request(host, "POST", "/api/dumps", data,
                                      {"Content-Type": content_type})
    message = assert_json_413(status, headers, answer)
    assert message.startswith("big.h5: ")
    assert list((workspace.root / "tmp").iterdir()) == []
    assert json.loads(request(host, "GET", "/api/dumps")[2]) == []


def test_a_file_under_the_limit_is_taken(live):
    host, _workspace = live
    from tests.support.confine import DEMO_DUMPS, multipart

    data, content_type = multipart(DEMO_DUMPS / "logistic_near_binary.h5")
    assert len(data) < LIMIT
    status, _headers, answer = request(host, "POST", "/api/dumps", data,
                                       {"Content-Type": content_type})
    assert status == 201 and json.loads(answer)["status"] == "queued"
