"""Shared fixtures."""

from __future__ import annotations

import threading

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
