"""Crash-safe record logs: estimates, maps and status, as codec messages in one file.

File layout (all integers little-endian)::

    file    = magic (8 bytes: b"BRIMLOG" + version byte 0x01) , record*
    record  = body_len (u32) , crc32 (u32, over body) , body
    body    = n_frames (u16) , { frame_len (u32) , frame bytes } * n_frames

Each record is one :func:`brimline.daemon.wire.codec.encode` message (``[topic, header, parts]``).
The writer flushes after every record, so a crash of the process loses at most the record being
written (with ``fsync=True``, also a crash of the machine). The reader stops cleanly at a torn
last record (short, or failing its CRC at the very end of the file), counts it and warns; a bad
record with more data after it is corruption and raises
:class:`~brimline.daemon.errors.RecordingError` naming the file and record number.

The first record of a file written by :class:`RecordWriter` is a ``meta`` dict (format, software
version, creation time, and whatever the caller adds). With ``max_bytes`` a recording continues
in ``NAME.0001.EXT``, ``NAME.0002.EXT``, ...; :func:`recording_paths` lists the files in order.
"""

from __future__ import annotations

import datetime
import os
import struct
import warnings
import zlib
from pathlib import Path
from typing import Any, BinaryIO, Iterable, Iterator, Sequence

from brimline.daemon import __version__
from brimline.daemon.errors import ProtocolError, RecordingError
from brimline.daemon.wire import codec

__all__ = ["MAGIC", "unpack_record", "RecordWriter", "RecordReader", "TornRecordWarning", "TOPIC_META",
           "pack_record", "recording_paths", "read_recording"]

MAGIC = b"BRIMLOG\x01"
TOPIC_META = "meta"
_HEAD = struct.Struct("<II")
_U16 = struct.Struct("<H")
_U32 = struct.Struct("<I")
_MAX_BODY = 1 << 28  # 256 MiB: anything larger is a corrupt length, not a record


class TornRecordWarning(UserWarning):
    """The last record of a recording was cut short (a crash while writing it)."""


def pack_record(frames: Sequence[Any]) -> bytes:
    """One record's bytes (length, CRC, body) for a list of frames."""
    views = [codec.byte_view(f) for f in frames]
    if len(views) > 0xFFFF:
        raise ValueError(f"a record holds at most 65535 frames, got {len(views)}")
    body = bytearray(_U16.pack(len(views)))
    for v in views:
        body += _U32.pack(v.nbytes)
        body += v
    if len(body) > _MAX_BODY:
        raise ValueError(f"record of {len(body)} bytes exceeds {_MAX_BODY}")
    return _HEAD.pack(len(body), zlib.crc32(body)) + bytes(body)


def unpack_record(data: bytes, pos: int = 0) -> tuple[list[bytes] | None, int]:
    """Read one record (as :func:`pack_record` wrote it) from ``data`` at byte ``pos``.

    Returns
    -------
    frames : list of bytes or None
        The record's frames; None when the record is short, fails its checksum or has a bad
        frame layout.
    end : int
        Byte position after the record (``len(data)`` when it is short).
    """
    if len(data) < pos + _HEAD.size:
        return None, len(data)
    size, crc = _HEAD.unpack_from(data, pos)
    start = pos + _HEAD.size
    body = bytes(data[start:start + size])
    if len(body) != size or zlib.crc32(body) != crc:
        return None, min(start + size, len(data))
    return _unpack_body(body), start + size


def _unpack_body(body: bytes) -> list[bytes] | None:
    if len(body) < 2:
        return None
    (n,) = _U16.unpack_from(body, 0)
    pos, frames = 2, []
    for _ in range(n):
        if pos + 4 > len(body):
            return None
        (size,) = _U32.unpack_from(body, pos)
        pos += 4
        if pos + size > len(body):
            return None
        frames.append(body[pos:pos + size])
        pos += size
    return frames if pos == len(body) else None


def recording_paths(path: str | Path) -> list[Path]:
    """``path`` followed by its rotated continuations (``NAME.0001.EXT``, ...) that exist."""
    p = Path(path)
    out = [p] if p.exists() else []
    i = 1
    while True:
        nxt = _rotated(p, i)
        if not nxt.exists():
            return out
        out.append(nxt)
        i += 1


def read_recording(path: str | Path, *,
                   topics: Iterable[str] | None = None) -> Iterator[tuple[str, Any]]:
    """``(topic, record)`` from ``path`` and its rotated continuations, in order.

    Raises
    ------
    RecordingError
        When ``path`` does not exist, or as :class:`RecordReader` does.
    """
    paths = recording_paths(path)
    if not paths:
        raise RecordingError(f"{path}: no such recording")
    for p in paths:
        with RecordReader(p, topics=topics) as reader:
            yield from reader


def _rotated(path: Path, index: int) -> Path:
    return path.with_name(f"{path.stem}.{index:04d}{path.suffix}")


class RecordWriter:
    """Appends codec messages to a recording, one flushed record at a time.

    Parameters
    ----------
    path : str or Path
        File to create. An existing file is refused (recordings are never overwritten).
    topics : iterable of str or None
        Topics to keep; :meth:`write` skips others. None keeps all.
    max_bytes : int or None
        Start a new file (``NAME.0001.EXT``, ``NAME.0002.EXT``, ...) once a file exceeds this
        size; None never rotates.
    fsync : bool
        Also fsync after each record (survives a machine crash, costs a disk round trip).
    meta : dict or None
        Extra keys for the leading ``meta`` record (scenario, config, plan id, ...).

    Raises
    ------
    RecordingError
        When the file exists or cannot be created; names the path.
    """

    def __init__(self, path: str | Path, *, topics: Iterable[str] | None = None,
                 max_bytes: int | None = None, fsync: bool = False,
                 meta: dict | None = None) -> None:
        if max_bytes is not None and max_bytes < 1024:
            raise ValueError(f"max_bytes={max_bytes} must be >= 1024")
        self.path = Path(path)
        self.topics = None if topics is None else frozenset(topics)
        self.max_bytes = max_bytes
        self.fsync = bool(fsync)
        self._meta = dict(meta or {})
        self._index = 0
        self._file: BinaryIO | None = None
        self._size = 0
        self.records = 0
        self.skipped = 0
        self._closed = False
        self._open(self.path)

    @property
    def current_path(self) -> Path:
        """The file being written now (differs from ``path`` after a rotation)."""
        return self.path if self._index == 0 else _rotated(self.path, self._index)

    def _open(self, path: Path) -> None:
        try:
            f = open(path, "xb")
        except FileExistsError:
            raise RecordingError(f"{path}: exists already; recordings are never "
                                 f"overwritten") from None
        except OSError as exc:
            raise RecordingError(f"{path}: cannot create recording: {exc}") from exc
        self._file = f
        self._size = 0
        self._put(MAGIC)
        meta = {"format": "brimline record log", "version": 1, "brimline": __version__,
                "created_utc": datetime.datetime.now(datetime.timezone.utc).isoformat(),
                "part": self._index, **self._meta}
        self._put(pack_record(codec.encode(TOPIC_META, meta)))

    def _put(self, data: bytes) -> None:
        try:
            self._file.write(data)
            self._file.flush()
            if self.fsync:
                os.fsync(self._file.fileno())
        except OSError as exc:
            raise RecordingError(f"{self.current_path}: write failed: {exc}") from exc
        self._size += len(data)

    def wants(self, topic: str) -> bool:
        """True when ``topic`` is recorded."""
        return self.topics is None or topic in self.topics

    def write(self, topic: str, record: Any) -> bool:
        """Encode and append ``record`` on ``topic``; False (counted) when the topic is off."""
        if not self.wants(topic):
            self._check_open()
            self.skipped += 1
            return False
        return self.write_frames(codec.encode(topic, record))

    def write_frames(self, frames: Sequence[Any]) -> bool:
        """Append an already encoded message (e.g. what ``MapPublisher.publish`` returned)."""
        self._check_open()
        topic = bytes(codec.byte_view(frames[0])).decode("ascii", "replace")
        if not self.wants(topic):
            self.skipped += 1
            return False
        if self.max_bytes is not None and self._size >= self.max_bytes:
            self._rotate()
        self._put(pack_record(frames))
        self.records += 1
        return True

    def _rotate(self) -> None:
        self._file.close()
        self._index += 1
        self._open(_rotated(self.path, self._index))

    def _check_open(self) -> None:
        if self._closed:
            raise RuntimeError(f"RecordWriter for {self.path} is closed")

    def close(self) -> None:
        """Flush and close the file. Idempotent."""
        if self._closed:
            return
        self._closed = True
        if self._file is not None:
            try:
                self._file.flush()
                if self.fsync:
                    os.fsync(self._file.fileno())
            finally:
                self._file.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc) -> None:
        self.close()


class RecordReader:
    """Reads a recording back as ``(topic, record)`` pairs.

    Parameters
    ----------
    path : str or Path
        A file written by :class:`RecordWriter`.
    topics : iterable of str or None
        Yield only these topics (the ``meta`` record is never yielded; see :attr:`meta`).

    Attributes
    ----------
    meta : dict
        The leading ``meta`` record (empty when the file has none).
    records : int
        Records read so far (the meta record is record 0).
    torn : int
        1 when the file ended in a torn record (after iteration reached it), else 0.

    Raises
    ------
    RecordingError
        At open: missing or unreadable file, wrong magic or version. While iterating: a record
        that fails its CRC or does not decode, with more data after it (names the file and the
        record number).
    """

    def __init__(self, path: str | Path, *, topics: Iterable[str] | None = None) -> None:
        self.path = Path(path)
        self.topics = None if topics is None else frozenset(topics)
        self.records = 0
        self.torn = 0
        self.meta: dict = {}
        self._closed = False
        try:
            self._file: BinaryIO = open(self.path, "rb")
        except OSError as exc:
            raise RecordingError(f"{self.path}: cannot open recording: {exc}") from None
        try:
            magic = self._file.read(len(MAGIC))
            if magic[:7] != MAGIC[:7]:
                raise RecordingError(f"{self.path}: not a brimline recording (bad magic)")
            if magic != MAGIC:
                raise RecordingError(f"{self.path}: recording format version {magic[7:]!r}, "
                                     f"this reader reads {MAGIC[7:]!r}")
            self._pending = None
            first = self._next_frames()
            if first is not None:
                topic, record = self._decode(first)
                if topic == TOPIC_META and isinstance(record, dict):
                    self.meta = record
                else:
                    self._pending = (topic, record)
        except BaseException:
            self._file.close()
            raise

    def _next_frames(self) -> list[bytes] | None:
        """Next record's frames; None at a clean end or a torn tail."""
        f = self._file
        head = f.read(_HEAD.size)
        if not head:
            return None
        number = self.records
        if len(head) < _HEAD.size:
            return self._torn(number, "short record header")
        size, crc = _HEAD.unpack(head)
        if size > _MAX_BODY:
            raise RecordingError(f"{self.path}: record {number}: length {size} is corrupt")
        body = f.read(size)
        if len(body) < size:
            return self._torn(number, f"{len(body)} of {size} bytes")
        frames = _unpack_body(body) if zlib.crc32(body) == crc else None
        if frames is None:
            if not f.read(1):  # nothing after it: the last record was being written
                return self._torn(number, "checksum mismatch at the end of the file")
            raise RecordingError(f"{self.path}: record {number}: checksum mismatch or bad "
                                 f"frame layout")
        self.records += 1
        return frames

    def _torn(self, number: int, what: str) -> None:
        self.torn = 1
        warnings.warn(f"{self.path}: record {number} is torn ({what}); stopped there",
                      TornRecordWarning, stacklevel=3)
        return None

    def _decode(self, frames: list[bytes]) -> tuple[str, Any]:
        try:
            return codec.decode(frames)
        except ProtocolError as exc:
            raise RecordingError(f"{self.path}: record {self.records - 1}: {exc}") from exc

    def frames(self) -> Iterator[list[bytes]]:
        """Raw frames of each record after the meta record (no decoding, no topic filter)."""
        self._check_open()
        while True:
            frames = self._next_frames()
            if frames is None:
                return
            yield frames

    def __iter__(self) -> Iterator[tuple[str, Any]]:
        self._check_open()
        if self._pending is not None:
            pending, self._pending = self._pending, None
            if self.topics is None or pending[0] in self.topics:
                yield pending
        for frames in self.frames():
            topic = frames[0].decode("ascii", "replace")
            if self.topics is not None and topic not in self.topics:
                continue
            yield self._decode(frames)

    def _check_open(self) -> None:
        if self._closed:
            raise RuntimeError(f"RecordReader for {self.path} is closed")

    def close(self) -> None:
        """Close the file. Idempotent."""
        if not self._closed:
            self._closed = True
            self._file.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc) -> None:
        self.close()
