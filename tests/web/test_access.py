"""Who may use the dashboard: the token off loopback, the Host and Origin checks on loopback."""

from __future__ import annotations

import io

import pytest

from actdoc.web import create_app
from actdoc.web.server import address, is_loopback, resolve_token


@pytest.fixture
def locked(workspace_dir):
    return create_app(workspace_dir, token="s3cret-token").test_client()


def test_every_route_needs_the_token(locked):
    for method, url in (("get", "/"), ("get", "/api/dumps"), ("get", "/assets/plotly.min.js"),
                        ("get", "/static/actdoc.css"), ("delete", "/api/dumps/x"),
                        ("post", "/api/dumps")):
        response = getattr(locked, method)(url)
        assert response.status_code == 401, url
        assert response.headers["WWW-Authenticate"] == "Bearer"
    assert locked.get("/api/dumps").get_json()["error"].startswith("this dashboard needs")
    wrong = locked.get("/api/dumps", headers={"Authorization": "Bearer nope"})
    assert wrong.status_code == 401


def test_bearer_header_and_the_printed_address_let_a_client_in(locked):
    ok = locked.get("/api/dumps", headers={"Authorization": "Bearer s3cret-token"})
    assert ok.status_code == 200 and ok.get_json() == []
    first = locked.get("/?token=s3cret-token")
    assert first.status_code == 200
    assert "HttpOnly" in first.headers["Set-Cookie"]
    assert locked.get("/").status_code == 200  # the cookie now carries the token


def test_token_is_generated_off_loopback_only():
    assert resolve_token("127.0.0.1", None) is None
    assert resolve_token("localhost", None) is None
    assert resolve_token("::1", None) is None
    generated = resolve_token("0.0.0.0", None)
    assert generated and len(generated) >= 24
    assert resolve_token("0.0.0.0", None) != generated
    assert resolve_token("192.168.1.5", "given") == "given"
    assert not is_loopback("0.0.0.0") and is_loopback("[::1]")
    assert address("::", 8150, "t") == "http://[::]:8150/?token=t"


def test_loopback_dashboard_refuses_foreign_host_names(client):
    assert client.get("/api/dumps").status_code == 200
    assert client.get("/api/dumps", headers={"Host": "127.0.0.1:8150"}).status_code == 200
    assert client.get("/api/dumps", headers={"Host": "[::1]:8150"}).status_code == 200
    rebound = client.get("/api/dumps", headers={"Host": "attacker.example:8150"})
    assert rebound.status_code == 403


def test_pages_of_other_sites_cannot_post_or_delete(client):
    upload = client.post("/api/dumps", data={"file": (io.BytesIO(b"x"), "x.h5")},
                         content_type="multipart/form-data",
                         headers={"Origin": "http://attacker.example"})
    assert upload.status_code == 403
    delete = client.delete("/api/dumps/x", headers={"Origin": "http://attacker.example"})
    assert delete.status_code == 403
    same_site = client.delete("/api/dumps/x", headers={"Origin": "http://localhost"})
    assert same_site.status_code == 404
