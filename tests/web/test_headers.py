"""Response headers: the security headers on every answer (OWASP Secure Headers Project; W3C
Content Security Policy Level 3), download names in any script (RFC 6266, RFC 8187), and the
script and style files served compressed at content-hashed addresses (RFC 9110 content coding
and conditional requests, RFC 8246 immutable, RFC 9111 caching)."""

from __future__ import annotations

import email.message
import gzip
import hashlib
import urllib.request
from html.parser import HTMLParser
from pathlib import Path

import pytest
from werkzeug.http import parse_options_header

from actdoc.web import create_app
from actdoc.web.assets import plotly_js_path
from actdoc.web.plotly_bundle import trimmed_bundle
from actdoc.web.headers import ascii_fallback, attachment
from tests.support.browser import serve_in_thread
from tests.support.web import post_file, wait_until_done

UNICODE_NAME = "模型 ünïcode.h5"


def csp_directives(response) -> dict[str, list[str]]:
    """The policy parsed as CSP Level 3 section 2.2.1 says: ';'-separated directives, each a
    name and its source list."""
    policy = response.headers["Content-Security-Policy"]
    directives = {}
    for part in policy.split(";"):
        tokens = part.split()
        if tokens:
            directives.setdefault(tokens[0].lower(), tokens[1:])
    return directives


def assert_secure(response, where: str) -> None:
    headers = response.headers
    assert headers["X-Content-Type-Options"] == "nosniff", where
    assert headers["X-Frame-Options"] == "DENY", where
    assert headers["Referrer-Policy"] == "no-referrer", where
    csp = csp_directives(response)
    assert csp["script-src"] == ["'self'"], where  # no inline script, no eval, no other host
    assert csp["frame-ancestors"] == ["'none'"], where
    assert csp["default-src"] == ["'self'"] and csp["connect-src"] == ["'self'"], where
    assert csp["object-src"] == ["'none'"] and csp["form-action"] == ["'self'"], where
    assert csp["style-src"] == ["'self'", "'unsafe-inline'"], where  # plotly's inline styles


def test_every_kind_of_answer_carries_the_security_headers(client, ready_dump, workspace_dir):
    answers = {
        "page": client.get(f"/dumps/{ready_dump}"),
        "json twin": client.get(f"/dumps/{ready_dump}?format=json"),
        "api": client.get("/api/dumps"),
        "download": client.get(f"/api/dumps/{ready_dump}/findings.csv?download=1"),
        "404 page": client.get("/dumps/nothing"),
        "404 json": client.get("/api/dumps/nothing"),
        "400": client.get(f"/dumps/{ready_dump}/layers/0?page=x"),
        "405": client.put("/api/dumps"),
        "403 foreign host": client.get("/", headers={"Host": "attacker.example"}),
        "redirect": client.post(f"/dumps/{ready_dump}/delete"),
        "asset": client.get("/assets/plotly.min.js"),
        "static": client.get("/static/actdoc.css"),
    }
    for where, response in answers.items():
        assert_secure(response, where)
        response.close()
    locked = create_app(workspace_dir.parent / "locked", token="t0ken").test_client()
    assert_secure(locked.get("/"), "401")


class ScriptAudit(HTMLParser):
    """Every <script> of a page and every inline event handler attribute (onclick=...)."""

    def __init__(self):
        super().__init__()
        self.scripts: list[dict] = []
        self.handlers: list[str] = []

    def handle_starttag(self, tag, attrs):
        attributes = dict(attrs)
        if tag == "script":
            self.scripts.append(attributes)
        self.handlers += [f"{tag} {name}" for name in attributes if name.startswith("on")]


def test_pages_hold_no_inline_script_for_the_policy_to_block(client, ready_dump):
    """With script-src 'self' an inline script would not run: every <script> loads a file of
    this dashboard, or is a JSON data block (which browsers never run)."""
    for url in ("/", f"/dumps/{ready_dump}", f"/dumps/{ready_dump}/layers/1",
                f"/dumps/{ready_dump}/layers/1/units/2", "/dumps/nothing"):
        audit = ScriptAudit()
        audit.feed(client.get(url).get_data(as_text=True))
        assert audit.handlers == [], url
        for script in audit.scripts:
            if script.get("type") == "application/json":
                assert "src" not in script
            else:
                assert script["src"].startswith("/assets/"), (url, script)


# RFC 6266 / RFC 8187 -------------------------------------------------------------------------

def test_a_download_named_in_any_script_keeps_its_name_through_a_real_server(
        tmp_path, planted_dump):
    """PEP 3333: header values must be Latin-1; before RFC 8187 encoding such a name was a 500.
    Two parsers outside the project read the name back: werkzeug's and Python's email package
    (RFC 2231, which RFC 8187 profiles)."""
    app = create_app(tmp_path / "ws")
    upload = post_file(app.test_client(), planted_dump, name=UNICODE_NAME)
    dump_id = upload.get_json()["id"]
    assert wait_until_done(app.test_client(), dump_id)["status"] == "ready"
    serving = serve_in_thread(app)
    base = next(serving)
    try:
        url = f"{base}/api/dumps/{dump_id}/findings.json?download=1"
        with urllib.request.urlopen(url, timeout=30) as response:
            assert response.status == 200
            disposition = response.headers["Content-Disposition"]
            response.read()
    finally:
        next(serving, None)
    disposition.encode("latin-1")  # a legal header value
    assert disposition.isascii()
    assert 'filename="unicode-findings.json"' in disposition
    # werkzeug's parser prefers filename* as RFC 6266 section 4.3 asks of recipients.
    assert parse_options_header(disposition) == (
        "attachment", {"filename": "模型 ünïcode-findings.json"})
    extended = [part for part in disposition.split("; ") if part.startswith("filename*=")]
    parsed = email.message.EmailMessage()
    parsed["Content-Disposition"] = "attachment; " + extended[0]
    assert parsed.get_filename() == "模型 ünïcode-findings.json"


@pytest.mark.parametrize("name, fallback", [
    ("模型 ünïcode-findings.json", "unicode-findings.json"),
    ("Ärger.csv", "Arger.csv"),
    ("plain-name_1.md", "plain-name_1.md"),
    ("漢字.txt", "download.txt"),
    ('a"b\\c/d.json', "a_b_c_d.json"),
])
def test_the_ascii_fallback_name(name, fallback):
    assert ascii_fallback(name) == fallback


def test_quotes_separators_and_line_breaks_never_reach_the_header():
    value = attachment('x"\r\nSet-Cookie: a=b/../y.csv')
    assert "\r" not in value and "\n" not in value
    _kind, params = parse_options_header(value)
    name = params["filename"]
    assert "/" not in name and '"' not in name and "\n" not in name
    assert name.endswith(".csv")


# Compressed, content-hashed, cached assets ----------------------------------------------------

class AssetLinks(HTMLParser):
    def __init__(self):
        super().__init__()
        self.urls: list[str] = []

    def handle_starttag(self, tag, attrs):
        attributes = dict(attrs)
        url = attributes.get("src") if tag == "script" else attributes.get("href")
        if url and (tag == "script" or tag == "link"):
            self.urls.append(url)


def asset_urls(client, url: str) -> dict[str, str]:
    links = AssetLinks()
    links.feed(client.get(url).get_data(as_text=True))
    return {link.rsplit("/", 1)[1]: link for link in links.urls}


def test_plotly_goes_out_gzip_compressed_at_a_hashed_address_cached_for_a_year(client,
                                                                              ready_dump):
    urls = asset_urls(client, f"/dumps/{ready_dump}")
    shipped = trimmed_bundle(plotly_js_path().read_text(encoding="utf-8")).encode("utf-8")
    digest = hashlib.sha256(shipped).hexdigest()[:16]
    assert urls["plotly.min.js"] == f"/assets/{digest}/plotly.min.js"

    packed = client.get(urls["plotly.min.js"], headers={"Accept-Encoding": "gzip, br"})
    assert packed.status_code == 200
    assert packed.headers["Content-Encoding"] == "gzip"
    assert packed.headers["Cache-Control"] == "public, max-age=31536000, immutable"
    assert "Accept-Encoding" in packed.headers["Vary"]
    assert packed.mimetype == "text/javascript"
    assert gzip.decompress(packed.data) == shipped
    assert len(packed.data) < 0.4 * len(shipped)

    plain = client.get(urls["plotly.min.js"], headers={"Accept-Encoding": "gzip;q=0"})
    assert "Content-Encoding" not in plain.headers
    assert plain.get_data() == shipped
    assert plain.headers["Cache-Control"] == packed.headers["Cache-Control"]
    plain.close()

    again = client.get(urls["plotly.min.js"], headers={
        "Accept-Encoding": "gzip", "If-None-Match": packed.headers["ETag"]})
    assert again.status_code == 304 and again.data == b""


def test_own_static_files_are_hashed_compressed_and_an_old_address_moves_on(client, app):
    urls = asset_urls(client, "/")
    static = Path(app.static_folder)
    for name in ("actdoc.css", "actdoc.js"):
        answer = client.get(urls[name], headers={"Accept-Encoding": "gzip"})
        assert answer.headers["Cache-Control"] == "public, max-age=31536000, immutable"
        assert gzip.decompress(answer.data) == (static / name).read_bytes()
    stale = client.get("/assets/0123456789abcdef/actdoc.css")
    assert stale.status_code == 302 and stale.headers["Location"].endswith(urls["actdoc.css"])
    assert stale.headers["Cache-Control"] == "no-cache"
    for missing in ("/assets/0123456789abcdef/nothing.css", "/assets/x/../pyproject.toml",
                    "/assets/x/%2e%2e/%2e%2e/pyproject.toml"):
        assert client.get(missing).status_code == 404, missing


def test_the_unhashed_plotly_address_is_revalidated(client):
    answer = client.get("/assets/plotly.min.js", headers={"Accept-Encoding": "gzip"})
    assert answer.headers["Cache-Control"] == "no-cache"
    served = trimmed_bundle(plotly_js_path().read_text(encoding="utf-8")).encode("utf-8")
    assert gzip.decompress(answer.data) == served
