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
