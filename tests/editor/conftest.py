"""Fixtures of the editor tests: an Xvfb display for the window tests.

``xserver`` starts one ``Xvfb :N -screen 0 1280x1024x24`` per test session on a free display
number (Xvfb chooses it through ``-displayfd``) and stops it at the end; ``display`` sets
``DISPLAY`` for one test. When Xvfb, xdotool or xwd is missing the fixture fails (it never
skips) and says that `make test` installs them.
"""

from __future__ import annotations

import pytest

from tests.editor.xdrive import XServer, reap_children, start_xvfb, stop_xvfb


@pytest.fixture(scope="session")
def xserver():
    server = start_xvfb(screen="1280x1024x24")
    try:
        yield server
    finally:
        stop_xvfb(server)


@pytest.fixture
def display(xserver: XServer, monkeypatch: pytest.MonkeyPatch):
    """The session's Xvfb server, with DISPLAY pointing at it for this test; editor
    processes the test left running are killed afterwards."""
    if xserver.process.poll() is not None:
        pytest.fail(f"Xvfb {xserver.display} has stopped (exit code {xserver.process.returncode})")
    monkeypatch.setenv("DISPLAY", xserver.display)
    try:
        yield xserver
    finally:
        reap_children()
