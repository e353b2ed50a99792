"""Pytest fixtures for tests that need a JACK server (import them into the test module).

``from jack_fixture import jack_server, jack_server_private``

Both start a JACK2 dummy-driver server under a name of our own (``fmtest-<n>``, a free name
from a small pool), so a test never touches another JACK server on the machine, and put ``JACK_DEFAULT_SERVER`` (and
``JACK_NO_START_SERVER=1``) into this process's environment for the duration, so the audio
children and helper processes the test starts use that server. Without jackd, PortAudio or
sounddevice the tests skip with the reason, except under CI=true, where that is a failure
(CI cannot silently skip them).
"""

from __future__ import annotations

import ctypes.util
import importlib.util
import os

import pytest

from fieldmix.audio.jackutil import JackServer, jack_available

IN_CI = os.environ.get("CI", "").lower() in ("1", "true", "yes")


def require_jack() -> None:
    problems = []
    missing = jack_available()
    if missing:
        problems.append(f"JACK tools not installed: {missing} (apt package jackd2)")
    if not ctypes.util.find_library("portaudio"):
        problems.append("PortAudio not installed (apt package libportaudio2)")
    if importlib.util.find_spec("sounddevice") is None:  # find, do not import (it would open a JACK client)
        problems.append("Python package sounddevice not installed")
    if problems:
        msg = "; ".join(problems)
        if IN_CI:
            pytest.fail(f"required under CI=true: {msg}")
        pytest.skip(msg)


def _serve(log_dir):
    require_jack()
    # the name comes from JackServer's pool (fmtest-0 ...): see fieldmix.audio.jackutil on
    # why not a pid-based name (JACK's machine-wide server registry has 8 slots)
    srv = JackServer(samplerate=48000, period=128, capture=16, playback=16, log_path=log_dir / "jackd.log")
    srv.start(timeout=20.0)
    mp = pytest.MonkeyPatch()
    mp.setenv("JACK_DEFAULT_SERVER", srv.name)
    mp.setenv("JACK_NO_START_SERVER", "1")
    return srv, mp


@pytest.fixture(scope="module")
def jack_server(tmp_path_factory):
    """A dummy JACK server shared by the tests of one module (48 kHz, 128 frames, 16 in / 16 out)."""
    srv, mp = _serve(tmp_path_factory.mktemp("jack"))
    try:
        yield srv
    finally:
        mp.undo()
        srv.stop()


@pytest.fixture
def jack_server_private(tmp_path):
    """A server of the test's own, for tests that stop and restart it."""
    srv, mp = _serve(tmp_path)
    try:
        yield srv
    finally:
        mp.undo()
        srv.stop()
