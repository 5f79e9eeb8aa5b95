"""Response headers the whole dashboard shares: the security headers on every answer, and the
``Content-Disposition`` of downloads whose names may be any Unicode."""

from __future__ import annotations

import re
import unicodedata
from urllib.parse import quote

#: Own scripts only (no inline script, no eval); plotly.js sets inline styles, hence
#: 'unsafe-inline' for styles alone; images from the page itself and the data:/blob: URLs that
#: plotly's "download as PNG" makes; nothing may be fetched, framed or posted elsewhere.
#: Directives as defined by Content Security Policy Level 3 (W3C).
CONTENT_SECURITY_POLICY = "; ".join((
    "default-src 'self'",
    "script-src 'self'",
    "style-src 'self' 'unsafe-inline'",
    "img-src 'self' data: blob:",
    "font-src 'self'",
    "connect-src 'self'",
    "object-src 'none'",
    "base-uri 'none'",
    "form-action 'self'",
    "frame-ancestors 'none'",
))

#: The headers the OWASP Secure Headers Project recommends, as this dashboard sets them.
SECURITY_HEADERS = {
    "Content-Security-Policy": CONTENT_SECURITY_POLICY,
    "X-Frame-Options": "DENY",  # frame-ancestors for browsers that predate CSP 2
    "X-Content-Type-Options": "nosniff",
    "Referrer-Policy": "no-referrer",
    "Cross-Origin-Opener-Policy": "same-origin",
    "Cross-Origin-Resource-Policy": "same-origin",
}


def add_security_headers(response):
    """``after_request``: the security headers on every answer, error pages included."""
    for name, value in SECURITY_HEADERS.items():
        response.headers[name] = value
    return response


def ascii_fallback(name: str) -> str:
    """A plain-ASCII stand-in for ``name``: accents dropped (NFKD), every other character
    outside letters, digits, ``.``, ``-`` and ``_`` replaced by ``_``."""
    folded = unicodedata.normalize("NFKD", name).encode("ascii", "ignore").decode("ascii")
    stem, dot, ending = folded.rpartition(".")
    if not dot:
        stem, ending = folded, ""
    stem = re.sub(r"_+", "_", re.sub(r"[^A-Za-z0-9.-]", "_", stem)).strip("._-")
    ending = re.sub(r"[^A-Za-z0-9]", "", ending)
    return (stem or "download") + (f".{ending}" if ending else "")


def attachment(name: str) -> str:
    """``Content-Disposition`` for a download named ``name`` (any Unicode): an ASCII
    ``filename`` for old clients and ``filename*=UTF-8''...`` with the real name (RFC 6266
    section 4.3, RFC 8187 section 3.2). Path separators and control characters never reach it.
    """
    cleaned = "".join("_" if ch in '/\\"' or unicodedata.category(ch)[0] == "C" else ch
                      for ch in name).strip() or "download"
    return (f'attachment; filename="{ascii_fallback(cleaned)}"; '
            f"filename*=UTF-8''{quote(cleaned, safe='')}")
