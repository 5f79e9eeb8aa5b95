"""Running the dashboard: waitress (a production WSGI server, not Flask's), and its access token."""

from __future__ import annotations

import secrets
import sys
from pathlib import Path
from typing import TextIO

from actdoc.web.app import LOOPBACK_HOSTS, create_app

DEFAULT_PORT = 8150


def is_loopback(host: str) -> bool:
    return host.strip("[]").lower() in LOOPBACK_HOSTS


def resolve_token(host: str, token: str | None) -> str | None:
    """The token the server demands: the given one, else a fresh one off loopback, else None."""
    if token:
        return token
    return None if is_loopback(host) else secrets.token_urlsafe(24)


def address(host: str, port: int, token: str | None) -> str:
    shown = f"[{host}]" if ":" in host and not host.startswith("[") else host
    return f"http://{shown}:{port}/" + (f"?token={token}" if token else "")


def serve(host: str = "127.0.0.1", port: int = DEFAULT_PORT,
          workspace: str | Path | None = None, demo: bool = False, token: str | None = None,
          *, out: TextIO = sys.stdout) -> None:
    """Serve the dashboard with waitress until interrupted, printing its address first.

    Bound to anything but a loopback address, every request needs the token (printed here).
    """
    import waitress

    token = resolve_token(host, token)
    app = create_app(workspace, demo=demo, token=token)
    server = waitress.create_server(app, host=host, port=port, threads=8)
    print(f"actdoc dashboard on {address(host, server.effective_port, token)}", file=out)
    if token:
        print(f"every request needs the header 'Authorization: Bearer {token}' "
              "(the address above sets it in the browser)", file=out)
    print(f"workspace: {app.extensions['actdoc'].workspace.root}", file=out, flush=True)
    try:
        server.run()
    except KeyboardInterrupt:
        pass
    finally:
        server.close()
