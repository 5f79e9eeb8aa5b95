"""The suite collects the same tests however pytest is started (python -m pytest, the pytest
console script, and --import-mode=importlib), because shared helpers live in one importable
package, tests/support, and no test imports a conftest module or edits sys.path."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


def collected(command: list[str]) -> list[str]:
    env = {k: v for k, v in os.environ.items() if not k.startswith("PYTEST_")}
    done = subprocess.run(command + ["--collect-only", "-q", "-p", "no:cacheprovider", "tests"],
                          cwd=ROOT, capture_output=True, text=True, env=env, timeout=300)
    assert done.returncode == 0, done.stdout[-3000:] + done.stderr[-3000:]
    return sorted(line for line in done.stdout.splitlines() if "::" in line)


@pytest.mark.slow
def test_every_way_of_starting_pytest_collects_the_same_tests():
    console = Path(sys.executable).with_name("pytest")
    plain = collected([sys.executable, "-m", "pytest"])
    assert len(plain) > 400
    assert collected([str(console)]) == plain
    assert collected([sys.executable, "-m", "pytest", "--import-mode=importlib"]) == plain


def test_the_project_cites_only_its_own_contract():
    """The contract lives in docs/contract.md; no file cites a document outside the repository."""
    tracked = subprocess.run(["git", "ls-files"], cwd=ROOT, capture_output=True, text=True).stdout
    offenders = []
    for name in tracked.splitlines():
        path = ROOT / name
        if path.suffix not in {".py", ".md", ".html", ".js", ".css", ".toml", ".txt"}:
            continue
        if path.name == "test_collection.py":
            continue
        if "interfaces.md" in path.read_text(encoding="utf-8", errors="replace"):
            offenders.append(name)
    assert offenders == []
    assert (ROOT / "docs" / "contract.md").read_text().count("\n## ") >= 6
