"""The daemon's saved state: epoch, last sequence number and last map, saved atomically.

The file is a one-record recording (:mod:`brimline.daemon.recording` layout, magic and CRC
included) holding the last :class:`~brimline.daemon.records.LoadMap` on topic ``state``; the
epoch and the last ``seq`` are the map's own. :meth:`StateStore.save` writes a temporary file
in the same directory, fsyncs it, renames it over the old one with :func:`os.replace` (atomic on
POSIX and Windows) and fsyncs the directory, so after a crash at any point either the old or the
new state loads, never a mixture.

Sequence numbers never repeat across restarts provided the service saves a map *before* it
publishes it: then every published seq is on disk, and the next start continues at
``saved.seq + 1`` (:attr:`SavedState.next_seq`).
"""

from __future__ import annotations

import os
import tempfile
import uuid
import zlib
from dataclasses import dataclass
from pathlib import Path

from brimline.daemon import codec
from brimline.daemon.errors import ProtocolError, StateError
from brimline.daemon.records import LoadMap
from brimline.daemon.recording import _HEAD, MAGIC, _unpack_body, pack_record

__all__ = ["SavedState", "StateStore", "new_epoch", "TOPIC_STATE"]

TOPIC_STATE = "state"


def new_epoch() -> str:
    """A fresh epoch id: 16 hex digits from uuid4 (64 random bits)."""
    return uuid.uuid4().hex[:16]


@dataclass(frozen=True)
class SavedState:
    """What a restart continues from.

    Attributes
    ----------
    epoch : str
        Epoch id of the saved map.
    seq : int
        Last sequence number used (published or about to be).
    load_map : LoadMap
        The last map.
    """

    epoch: str
    seq: int
    load_map: LoadMap

    @property
    def next_seq(self) -> int:
        """The first sequence number a restart may use."""
        return self.seq + 1


class StateStore:
    """Load and atomically save the daemon state at ``path``.

    Parameters
    ----------
    path : str or Path
        State file; its directory must exist.
    fsync : bool
        fsync the file and the directory on save (default True; tests of speed may turn it off).
    """

    def __init__(self, path: str | Path, *, fsync: bool = True) -> None:
        self.path = Path(path)
        self.fsync = bool(fsync)

    def load(self) -> SavedState | None:
        """The saved state, or None when there is no state file.

        Raises
        ------
        StateError
            When the file exists but cannot be read, is truncated or corrupt; names the path.
            (The service decides whether to start fresh.)
        """
        try:
            data = self.path.read_bytes()
        except FileNotFoundError:
            return None
        except OSError as exc:
            raise StateError(f"{self.path}: cannot read state: {exc}") from None
        if not data.startswith(MAGIC):
            raise StateError(f"{self.path}: not a brimline state file (bad magic)")
        pos = len(MAGIC)
        if len(data) < pos + _HEAD.size:
            raise StateError(f"{self.path}: state file is truncated")
        size, crc = _HEAD.unpack_from(data, pos)
        body = data[pos + _HEAD.size:]
        if len(body) != size or zlib.crc32(body) != crc:
            raise StateError(f"{self.path}: state file is truncated or corrupt (length or "
                             f"checksum mismatch)")
        frames = _unpack_body(body)
        if frames is None:
            raise StateError(f"{self.path}: state file has a bad frame layout")
        try:
            topic, record = codec.decode(frames)
        except ProtocolError as exc:
            raise StateError(f"{self.path}: {exc}") from None
        if topic != TOPIC_STATE or not isinstance(record, LoadMap):
            raise StateError(f"{self.path}: holds {topic!r}, not a saved map")
        return SavedState(epoch=record.epoch, seq=record.seq, load_map=record)

    def save(self, load_map: LoadMap) -> None:
        """Atomically replace the saved state with ``load_map``.

        Raises
        ------
        StateError
            When the file cannot be written; the previous state is left intact.
        """
        data = MAGIC + pack_record(codec.encode(TOPIC_STATE, load_map))
        d = self.path.parent
        tmp = None
        try:
            fd, tmp = tempfile.mkstemp(dir=d, prefix=f".{self.path.name}.", suffix=".tmp")
            with os.fdopen(fd, "wb") as f:
                f.write(data)
                f.flush()
                if self.fsync:
                    os.fsync(f.fileno())
            os.replace(tmp, self.path)
            tmp = None
            if self.fsync:
                self._fsync_dir(d)
            for stale in d.glob(f".{self.path.name}.*.tmp"):  # left by an earlier crash
                stale.unlink(missing_ok=True)
        except OSError as exc:
            raise StateError(f"{self.path}: cannot save state: {exc}") from exc
        finally:
            if tmp is not None:
                try:
                    os.unlink(tmp)
                except OSError:
                    pass

    @staticmethod
    def _fsync_dir(d: Path) -> None:
        if os.name != "posix":  # directories cannot be opened for fsync on Windows
            return
        fd = os.open(d, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)
