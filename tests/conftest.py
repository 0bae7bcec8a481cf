"""Shared fixtures: the repository root and small scan files."""

import hashlib
import os
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
BIN = Path(sys.executable).parent


@pytest.fixture(scope="session", autouse=True)
def _fresh_threshold_cache(tmp_path_factory):
    """Tests compute SK thresholds afresh: the user's on-disk cache is not read."""
    old = os.environ.get("XDG_CACHE_HOME")
    os.environ["XDG_CACHE_HOME"] = str(tmp_path_factory.mktemp("cache"))
    yield
    if old is None:
        os.environ.pop("XDG_CACHE_HOME", None)
    else:
        os.environ["XDG_CACHE_HOME"] = old


@pytest.fixture(scope="session")
def repo_root():
    return ROOT


def sha256(path):
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def tool_env():
    """Environment for subprocesses: this interpreter's bin/ first on PATH."""
    env = dict(os.environ)
    env["PATH"] = f"{BIN}{os.pathsep}{env.get('PATH', '')}"
    env.setdefault("PYTHONHASHSEED", "0")
    return env
