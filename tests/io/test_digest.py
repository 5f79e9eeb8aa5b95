"""The dump's identity: SHA-256 of its bytes, against coreutils' sha256sum and plain hashlib."""

from __future__ import annotations

import hashlib
import shutil
import subprocess

import numpy as np
import pytest

from actdoc.digest import file_sha256


@pytest.mark.parametrize("size", [0, 1, (1 << 22) - 1, (1 << 22) + 7, 3 * (1 << 22)])
def test_matches_hashlib_over_a_plain_read(tmp_path, size):
    path = tmp_path / "blob.bin"
    path.write_bytes(np.random.default_rng(size).integers(0, 256, size, np.uint8).tobytes())
    assert file_sha256(path) == hashlib.sha256(path.read_bytes()).hexdigest()


@pytest.mark.skipif(shutil.which("sha256sum") is None, reason="coreutils sha256sum not found")
def test_matches_sha256sum(tmp_path):
    path = tmp_path / "blob.bin"
    path.write_bytes(b"actdoc" * 100_000)
    expected = subprocess.run(["sha256sum", str(path)], capture_output=True, text=True,
                              check=True).stdout.split()[0]
    assert file_sha256(path) == expected
