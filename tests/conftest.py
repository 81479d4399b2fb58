"""Shared test fixtures."""

from __future__ import annotations

import signal
from collections.abc import Iterator

import pytest

_HANDLED = (signal.SIGTERM, signal.SIGINT, signal.SIGHUP)


@pytest.fixture(autouse=True)
def _restore_signal_handlers() -> Iterator[None]:
    """Put back the SIGTERM/SIGINT/SIGHUP handlers a test replaced (``main(["run"])``
    in-process installs the daemon's own), so Ctrl-C still stops pytest and later tests
    start from pytest's handlers."""
    saved = {signum: signal.getsignal(signum) for signum in _HANDLED}
    yield
    for signum, handler in saved.items():
        if signal.getsignal(signum) is not handler:
            signal.signal(signum, handler)
