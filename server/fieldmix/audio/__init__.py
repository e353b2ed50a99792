"""Audio I/O: the audio child process and the control process's link to it.

- :mod:`fieldmix.audio.link`    ``AudioLink``: control side (start, targets, layout, meters, supervision)
- :mod:`fieldmix.audio.child`   the child's main: engine + one backend (virtual clock or device stream)
- :mod:`fieldmix.audio.shm`     the shared-memory block and its seqlocks
- :mod:`fieldmix.audio.devices` device listing and matching (sounddevice only in a child)
- :mod:`fieldmix.audio.jackutil` JACK helpers for tests and benchmarks

This package imports nothing heavy at the top: the audio child is started with the
"spawn" method and must be able to set its thread environment before numpy loads.
"""

from __future__ import annotations

__all__ = ["AudioLink"]


def __getattr__(name):  # lazy, so importing the package does not import numpy
    if name == "AudioLink":
        from .link import AudioLink

        return AudioLink
    raise AttributeError(name)
