"""The wheel carries the dashboard's templates and static files where the app looks for them."""

from __future__ import annotations

import subprocess
import sys
import zipfile
from pathlib import Path

REPO = Path(__file__).resolve().parents[2]


def test_wheel_holds_templates_and_static_files(tmp_path):
    built = subprocess.run(
        [sys.executable, "-m", "pip", "wheel", "--no-deps", "--no-build-isolation",
         "-w", str(tmp_path), str(REPO)],
        capture_output=True, text=True, timeout=240)
    assert built.returncode == 0, built.stdout[-2000:] + built.stderr[-2000:]
    wheel = next(tmp_path.glob("actdoc-*.whl"))
    names = set(zipfile.ZipFile(wheel).namelist())
    templates = {p.name for p in (REPO / "templates").glob("*.html")}
    static = {p.name for p in (REPO / "static").iterdir() if p.is_file()}
    assert templates >= {"base.html", "home.html", "overview.html", "layer.html", "unit.html",
                         "error.html"}
    for name in templates:
        assert f"actdoc/templates/{name}" in names
    for name in static:
        assert f"actdoc/static/{name}" in names
    assert "actdoc/web/app.py" in names and "actdoc/workspace/__init__.py" in names
    assert "actdoc/confine/__main__.py" in names
    assert "actdoc/docs/checks.md" in names  # shown by the /help/checks page
