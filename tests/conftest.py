"""Shared fixtures."""

from __future__ import annotations

import shutil
import tempfile
import threading
from pathlib import Path

import pytest


@pytest.fixture(autouse=True)
def _no_leaked_threads():
    """Fail a test that leaves a non-daemon thread running (watchers must stop cleanly)."""
    before = set(threading.enumerate())
    yield
    leaked = [t for t in threading.enumerate() if t not in before and t.is_alive() and not t.daemon]
    for t in leaked:
        t.join(timeout=5)
    leaked = [t for t in leaked if t.is_alive()]
    assert not leaked, f"threads left running: {leaked}"


@pytest.fixture
def open_dir():
    """A folder every user may read and write, removed afterwards: pytest's own folders are its user's only, and
    tests that drop root privileges (``reliability_data.as_unprivileged``) must reach theirs."""
    path = Path(tempfile.mkdtemp(prefix="qcmon-open-"))
    path.chmod(0o777)
    try:
        yield path
    finally:
        shutil.rmtree(path, ignore_errors=True)
