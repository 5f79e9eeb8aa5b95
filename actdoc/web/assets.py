"""The dashboard's script and style files: plotly.js from the installed plotly package (never a
CDN) and our own static files, each at a content-hashed address, gzip-compressed once and kept
in memory, cacheable for a year.

``asset_url(name)`` (a template global) gives ``/assets/<digest>/<name>``; the digest is the
first 16 hex digits of the file's SHA-256, so a changed file gets a new address and a cached
copy can be kept forever (``Cache-Control: public, max-age=31536000, immutable``). An address
with an old digest redirects to the current one without being cached. Clients that accept gzip
(``Accept-Encoding``) get the compressed bytes, the others the file itself.

plotly.js goes out with only the trace types actdoc draws registered (actdoc.web.plotly_bundle),
which halves the time a first chart page waits for it.
"""

from __future__ import annotations

import gzip
import hashlib
import logging
import threading
from dataclasses import dataclass
from pathlib import Path

from flask import Blueprint, Response, current_app, redirect, request, send_file, url_for
from werkzeug.exceptions import NotFound

from actdoc.web.plotly_bundle import trimmed_bundle

blueprint = Blueprint("assets", __name__, url_prefix="/assets")

PLOTLY = "plotly.min.js"
#: A year, the longest lifetime RFC 9111 section 5.3 advises; with ``immutable`` (RFC 8246)
#: a browser does not even revalidate a file it holds.
FOREVER = "public, max-age=31536000, immutable"
#: Text types worth compressing; other files go out as they are.
COMPRESSIBLE = {".js": "text/javascript", ".css": "text/css", ".svg": "image/svg+xml"}
MEDIA_TYPES = {**COMPRESSIBLE, ".png": "image/png", ".ico": "image/x-icon"}


def plotly_js_path() -> Path:
    """plotly/package_data/plotly.min.js of the plotly Python package."""
    import plotly

    return Path(plotly.__file__).resolve().parent / "package_data" / PLOTLY


@dataclass(frozen=True)
class Packed:
    """One file as served: its identity on disk, its digest and its gzip-compressed bytes."""

    path: Path
    stamp: tuple[int, int]  # (size, mtime_ns) of the file these bytes were made from
    digest: str
    gzipped: bytes | None  # None where compressing does not pay (images)
    body: bytes | None = None  # what is served where it differs from the file (plotly.js)


_packed: dict[Path, Packed] = {}
_lock = threading.Lock()


def packed(path: Path) -> Packed:
    """The file at ``path`` hashed and compressed, once per content: a file changed on disk
    (an edited style sheet, an upgraded plotly) is read afresh."""
    info = path.stat()
    stamp = (info.st_size, info.st_mtime_ns)
    known = _packed.get(path)
    if known is not None and known.stamp == stamp:
        return known
    with _lock:
        known = _packed.get(path)
        if known is not None and known.stamp == stamp:
            return known
        data = path.read_bytes()
        body = served_plotly(data) if path.name == PLOTLY and path == plotly_js_path() else None
        if body is not None:
            data = body
        gzipped = (gzip.compress(data, compresslevel=9, mtime=0)
                   if path.suffix in COMPRESSIBLE else None)
        known = Packed(path, stamp, hashlib.sha256(data).hexdigest()[:16], gzipped, body)
        _packed[path] = known
        return known


def served_plotly(data: bytes) -> bytes | None:
    """plotly.js with only the drawn traces registered; None (serve the file whole, and say so
    in the log) when the bundle does not read as actdoc.web.plotly_bundle expects."""
    trimmed = trimmed_bundle(data.decode("utf-8"))
    if trimmed is None:
        logging.getLogger("actdoc").warning(
            "plotly.js: the installed bundle's trace list was not recognised; serving all of it")
        return None
    return trimmed.encode("utf-8")


def asset_path(name: str) -> Path:
    """The file behind an asset name: plotly.min.js or a file of the static folder."""
    if name == PLOTLY:
        path = plotly_js_path()
        if not path.is_file():
            raise NotFound("plotly.min.js is missing from the installed plotly package")
        return path
    folder = Path(current_app.static_folder).resolve()
    path = (folder / name).resolve()
    if folder not in path.parents or not path.is_file() or path.suffix not in MEDIA_TYPES:
        raise NotFound(f"there is no asset named '{name}'")
    return path


def asset_url(name: str) -> str:
    """The content-hashed address of an asset (for templates)."""
    return url_for("assets.hashed", digest=packed(asset_path(name)).digest, name=name)


def warm_plotly() -> None:
    """Hash and compress plotly.js ahead of the first chart page (in a background thread)."""
    path = plotly_js_path()
    if path.is_file():
        threading.Thread(target=packed, args=(path,), name="actdoc-assets", daemon=True).start()


def accepts_gzip() -> bool:
    return request.accept_encodings.quality("gzip") > 0


def send(path: Path, cache_control: str) -> Response:
    """The file, compressed when the client takes gzip, with validators and caching."""
    item = packed(path)
    media_type = MEDIA_TYPES[path.suffix]
    if item.gzipped is not None and accepts_gzip():
        response = Response(item.gzipped, mimetype=media_type)
        response.headers["Content-Encoding"] = "gzip"
        response.set_etag(item.digest + "-gz")
    elif item.body is not None:
        response = Response(item.body, mimetype=media_type)
        response.set_etag(item.digest)
    else:
        response = send_file(path, mimetype=media_type, etag=item.digest, conditional=False)
    if item.gzipped is not None:
        response.vary.add("Accept-Encoding")
    response.headers["Cache-Control"] = cache_control
    return response.make_conditional(request)


@blueprint.get("/<digest>/<path:name>")
def hashed(digest: str, name: str):
    path = asset_path(name)
    current = packed(path).digest
    if digest != current:
        response = redirect(url_for("assets.hashed", digest=current, name=name), code=302)
        response.headers["Cache-Control"] = "no-cache"
        return response
    return send(path, FOREVER)


@blueprint.get("/plotly.min.js")
def plotly_js():
    """The unhashed address of docs/dashboard.md: revalidated on every use."""
    return send(asset_path(PLOTLY), "no-cache")
