"""Shared test helpers.

System tools (sox, later jackd and chromium) are installed by ./dev.sh test where it can.
A test that needs one calls ``require_tool``: without the tool it skips with the reason,
except under CI=true, where a missing tool is a failure (so CI cannot silently skip).
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

REPO = Path(__file__).resolve().parents[1]
IN_CI = os.environ.get("CI", "").lower() in ("1", "true", "yes")


def require_tool(name: str) -> str:
    path = shutil.which(name)
    if path:
        return path
    if IN_CI:
        pytest.fail(f"{name} is required under CI=true but is not installed")
    pytest.skip(f"{name} is not installed (./dev.sh test installs it when run as root)")


def run_cli(*args, cwd=None, timeout=120):
    """Run ``python -m fieldmix ARGS`` in a subprocess; returns CompletedProcess (text)."""
    env = dict(os.environ)
    env["PYTHONPATH"] = str(REPO / "server") + os.pathsep + env.get("PYTHONPATH", "")
    return subprocess.run(
        [sys.executable, "-m", "fieldmix", *map(str, args)],
        cwd=cwd,
        env=env,
        capture_output=True,
        text=True,
        timeout=timeout,
    )


def write_files(folder: Path, files: dict) -> None:
    for name, content in files.items():
        p = folder / name
        p.parent.mkdir(parents=True, exist_ok=True)
        if isinstance(content, (dict, list)):
            p.write_text(json.dumps(content, indent=1), encoding="utf-8")
        elif isinstance(content, bytes):
            p.write_bytes(content)
        else:
            p.write_text(content, encoding="utf-8")


def write_tone(path: Path, freq=1000.0, seconds=3.0, sr=48000, amp=0.25, channels=1):
    import soundfile as sf

    t = np.arange(int(seconds * sr)) / sr
    x = (amp * np.sin(2 * np.pi * freq * t)).astype(np.float32)
    if channels > 1:
        x = np.stack([x] * channels, axis=1)
    sf.write(str(path), x, sr, subtype="FLOAT")
    return path


@pytest.fixture
def repo() -> Path:
    return REPO


class ServeDaemon:
    """``python -m fieldmix serve SHOW --virtual`` as a subprocess on ephemeral ports, driven
    over a real UDP socket and read back over real HTTP (state file next to the show).

    ``stop()`` sends ``sig`` (SIGTERM: fade out, save, exit 0), returns the exit code and
    leaves everything the daemon printed in ``output``."""

    def __init__(self, show: Path, *extra: str):
        import re
        import socket

        env = dict(os.environ)
        env["PYTHONPATH"] = str(REPO / "server") + os.pathsep + env.get("PYTHONPATH", "")
        self.state_file = Path(show).parent / "state.json"
        self.proc = subprocess.Popen(
            [sys.executable, "-m", "fieldmix", "serve", str(show), "--virtual", "--osc-port", "0", "--http-port", "0",
             "--no-advertise", "--state", str(self.state_file), *extra],
            env=env, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True,
        )  # fmt: skip
        self.lines: list[str] = []
        self.output = ""
        self.http = self.udp = None
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline and (self.http is None or self.udp is None):
            line = self.proc.stdout.readline()
            if not line:
                break
            self.lines.append(line)
            if m := re.search(r"page\s*: http://127\.0\.0\.1:(\d+)/", line):
                self.http = int(m.group(1))
            if m := re.search(r"OSC\s*: 127\.0\.0\.1 udp (\d+)", line):
                self.udp = int(m.group(1))
        assert self.http and self.udp, "".join(self.lines)
        self.sock = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
        self.sock.bind(("127.0.0.1", 0))
        self.sock.settimeout(5.0)

    def send(self, address, *args):
        from fieldmix.oscwire import encode_message

        self.sock.sendto(encode_message(address, list(args)), ("127.0.0.1", self.udp))

    def ping(self):
        """A barrier: /pong comes back after every packet sent before it was handled."""
        from fieldmix.oscwire import decode_packet

        self.send("/ping")
        while True:
            data, _ = self.sock.recvfrom(65536)
            if any(m.address == "/pong" for _, m in decode_packet(data)):
                return

    def state(self):
        import urllib.request

        with urllib.request.urlopen(f"http://127.0.0.1:{self.http}/api/state", timeout=5) as r:
            return json.loads(r.read())

    def wait(self, pred, timeout=10.0):
        deadline = time.monotonic() + timeout
        st = None
        while time.monotonic() < deadline:
            st = self.state()
            if pred(st):
                return st
            time.sleep(0.05)
        raise AssertionError(f"condition not met; last state: {json.dumps(st)[:2000]}")

    def stop(self, sig=None, timeout=20.0):
        import signal

        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM if sig is None else sig)
        try:
            rc = self.proc.wait(timeout)
        finally:
            self.sock.close()
            if self.proc.poll() is None:
                self.proc.kill()
                self.proc.wait(5)
        self.output = "".join(self.lines) + self.proc.stdout.read()
        self.proc.stdout.close()
        return rc
