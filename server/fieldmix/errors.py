"""User-facing errors.

Every problem a person can cause with a file or a message is raised as a
:class:`FieldmixError` whose ``str()`` is one clear line naming the place
(``speakers[3].azimuth: expected a number, got "left"``). The CLI prints that
line and exits with status 2; it never shows a traceback for these.
"""

from __future__ import annotations


class FieldmixError(Exception):
    """A problem caused by input (a file, an option, a message), not a bug."""


class ConfigError(FieldmixError):
    """A layout, show or script file is broken.

    ``where`` names the place: a file name plus a JSON path
    (``ring8.json: speakers[3].azimuth``) or a line (``control.txt line 12``).
    """

    def __init__(self, where: str, message: str):
        self.where = where
        self.message = message
        super().__init__(f"{where}: {message}" if where else message)


class ControlError(FieldmixError):
    """A control message (OSC, script line, web) that cannot be applied.

    ``reason`` is a short machine-readable code used for counting rejected
    messages by reason: one of ``unknown_address``, ``unknown_source``,
    ``bad_arg_count``, ``bad_type``, ``not_finite``, ``out_of_range``.
    """

    REASONS = (
        "unknown_address",
        "unknown_source",
        "bad_arg_count",
        "bad_type",
        "not_finite",
        "out_of_range",
        "busy",
    )

    def __init__(self, reason: str, message: str):
        if reason not in self.REASONS:
            raise ValueError(f"unknown ControlError reason {reason!r}")
        self.reason = reason
        self.message = message
        super().__init__(message)
