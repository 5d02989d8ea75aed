"""The one exception tree of brimline.

::

    BrimlineError                 root; the CLI turns any of these into one line and exit code 2
    ├── ConfigError               a config file, section, key or value is wrong (names the key path)
    ├── InputError                a file or flag given by the user is unreadable or malformed
    ├── InfeasibleError           a loading request cannot be met (target bits over the budget, ...)
    ├── SourceError               a driver cannot produce estimates (device missing, file gone)
    ├── SinkError                 a transmit sink cannot send (device missing, file unwritable)
    ├── RecordingError            a recording cannot be written or read back
    ├── ProtocolError             a message on the wire is malformed or fails its checks
    └── StateError                the saved daemon state cannot be read or written

Library errors are converted at the boundary with ``raise ... from exc`` and the message adds the
endpoint, path, line or frame number. Anything else that escapes is a bug and keeps its traceback.
"""

from __future__ import annotations

__all__ = [
    "BrimlineError",
    "ConfigError",
    "InputError",
    "InfeasibleError",
    "SourceError",
    "SinkError",
    "RecordingError",
    "ProtocolError",
    "StateError",
]


class BrimlineError(Exception):
    """Root of every error brimline raises on purpose."""


class ConfigError(BrimlineError):
    """A config file, section, key or value is wrong; the message names the key path and value."""


class InputError(BrimlineError):
    """A user-supplied file or flag is unreadable or malformed; the message names it."""


class InfeasibleError(BrimlineError):
    """A loading request cannot be met within the power budget and ceilings."""


class SourceError(BrimlineError):
    """A driver cannot produce estimates (device missing, capture file unreadable, ...)."""


class SinkError(BrimlineError):
    """A transmit sink cannot send (device missing, library missing, file unwritable, ...)."""


class RecordingError(BrimlineError):
    """A recording cannot be written, or read back (names the file and record number)."""


class ProtocolError(BrimlineError):
    """A message on the wire is malformed, from another version, or fails its checksum.

    Parameters
    ----------
    message : str
        What is wrong, naming the field or part.
    reason : str
        A short stable key for counting (``"header"``, ``"dtype"``, ``"shape"``, ...); socket
        loops count dropped messages by it. ``"malformed"`` when the raiser gives none.
    """

    def __init__(self, message: str = "", *, reason: str = "malformed") -> None:
        super().__init__(message)
        self.reason = reason


class StateError(BrimlineError):
    """The daemon's saved state cannot be read or written (names the file)."""
