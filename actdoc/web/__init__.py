"""The local dashboard: a Flask app over a workspace of dumps, served by waitress."""

from actdoc.web.app import create_app
from actdoc.web.server import serve

__all__ = ["create_app", "serve"]
