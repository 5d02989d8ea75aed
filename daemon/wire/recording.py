"""Crash-safe record logs: estimates, maps and status, as codec messages in one file.

File layout (all integers little-endian)::

    file    = magic (8 bytes: b"BRIMLOG" + version byte 0x01) , record*
    record  = body_len (u32) , crc32 (u32, over body) , body
    body    = n_frames (u16) , { frame_len (u32) , frame bytes } * n_frames

Each record is one :func:`brimline.daemon.wire.codec.encode` message (``[topic, header, parts]``).
The writer flushes after every record, so a crash of the process loses at most the record being
written (with ``fsync=True``, also a crash of the machine). The reader stops cleanly at a torn
last record (short, or failing its CRC at the very end of the file), counts it
(:attr:`RecordReader.torn`) and logs one warning on the ``brimline.recording`` logger; a bad
record with more data after it is corruption and raises
:class:`~brimline.daemon.errors.RecordingError` naming the file and record number.

The first record of a file written by :class:`RecordWriter` is a ``meta`` dict (format, software
version, creation time, part number, and whatever the caller adds).

A recording may be a set of files: with ``max_bytes`` the writer continues in ``NAME.0001.EXT``,
``NAME.0002.EXT``, ... (:func:`recording_paths` lists them). :class:`RecordSetReader` and
:func:`read_recording` read the whole set in order; a gap in the numbering is an error.
:func:`count_records` counts a topic's records from their lengths and topics alone (for
progress; no checksums). Readers use a 1 MiB buffer: an estimate record of a few hundred tones
is several KiB, and with Python's default 8 KiB buffer most records cost a system call.

Writing never leaves a file that blocks the next start: a file appears under its name only once
its magic and meta record are on disk (they are written to a temporary name in the same folder,
then linked in place). After a write error (disk full, device gone) the writer is *failed*: the
error is raised once as :class:`~brimline.daemon.errors.RecordingError`, later writes raise
``RecordingError`` at once without touching the file, and :meth:`RecordWriter.close` only
releases the handle (it never raises a raw ``OSError``).
"""

from __future__ import annotations

import datetime
import errno
import hashlib
import json
import logging
import os
import re
import struct
import uuid
import zlib
from pathlib import Path
from typing import Any, BinaryIO, Iterable, Iterator, Sequence

from brimline.daemon import __version__
from brimline.daemon.errors import ProtocolError, RecordingError
from brimline.daemon.wire import codec

__all__ = ["MAGIC", "recording_epoch", "TOPIC_META", "pack_record", "unpack_record", "RecordWriter", "RecordReader",
           "RecordSetReader", "recording_paths", "read_recording", "count_records"]

MAGIC = b"BRIMLOG\x01"
TOPIC_META = "meta"
_HEAD = struct.Struct("<II")
_U16 = struct.Struct("<H")
_U32 = struct.Struct("<I")
_MAX_BODY = 1 << 28  # 256 MiB: anything larger is a corrupt length, not a record
# Read buffer of RecordReader: an estimate record of a few hundred tones is several KiB, more
# than half of Python's default 8 KiB buffer, so most reads would be a system call of their own.
_READ_BUFFER = 1 << 20
# Errors of os.link that mean "this file system has no hard links", not "cannot write here".
_NO_LINKS = {errno.EPERM, errno.ENOTSUP, errno.EOPNOTSUPP, errno.ENOSYS, errno.EXDEV}

log = logging.getLogger("brimline.recording")


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
    """``path`` followed by its rotated continuations (``NAME.0001.EXT``, ...) that exist.

    The list stops at the first missing number; :class:`RecordSetReader` treats parts beyond
    such a gap as an error.
    """
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
        As :class:`RecordSetReader` does (missing first file, a gap in the parts, damage).
    """
    with RecordSetReader(path, topics=topics) as reader:
        yield from reader


def count_records(path: str | Path, topic: str) -> int:
    """How many records on ``topic`` a recording holds (all its parts), cheaply: only each
    record's length and topic are read, not its body (no checksum, no decoding).

    Meant for progress: a full read yields the same number from an intact recording, and
    fewer when a record is damaged (the read stops there) or the last one is torn with a
    good length. Counting in a file stops at its first record too short to hold its length
    and topic; a set stops at its first missing or unreadable file.

    Parameters
    ----------
    path : str or Path
        The recording's first file (its rotated continuations follow it).
    topic : str
        The topic to count (``"estimate"``).

    Returns
    -------
    int
    """
    want = topic.encode("ascii")
    # length, checksum, frame count and the topic frame's length: then the topic itself
    lead = struct.Struct("<IIHI")
    total = 0
    for p in recording_paths(path):
        try:
            with open(p, "rb", buffering=_READ_BUFFER) as f:
                if f.read(len(MAGIC)) != MAGIC:
                    break
                while True:
                    head = f.read(lead.size)
                    if len(head) < lead.size:
                        break
                    size, _crc, n_frames, topic_len = lead.unpack(head)
                    if n_frames == 0 and size == 2:   # a record of no frames: no topic
                        f.seek(-4, os.SEEK_CUR)
                        continue
                    if size > _MAX_BODY or size < 6 or topic_len > size - 6:
                        break
                    name = f.read(topic_len)
                    if len(name) < topic_len:
                        break
                    total += name == want
                    f.seek(size - 6 - topic_len, os.SEEK_CUR)
        except OSError:
            break
    return total


def recording_epoch(path: str | Path) -> str:
    """An epoch id that names a recording: 16 hex digits of SHA-256 over its first file's
    ``meta`` record (written once, when the recording was started).

    A replay with no saved state publishes under this epoch, so two replays of one recording
    give the same maps byte for byte, epoch included.

    Raises
    ------
    RecordingError
        When the recording cannot be read.
    """
    with RecordSetReader(path) as reader:
        meta = reader.meta
    text = json.dumps(meta, sort_keys=True, separators=(",", ":"), default=str)
    return hashlib.sha256(text.encode()).hexdigest()[:16]


def _rotated(path: Path, index: int) -> Path:
    return path.with_name(f"{path.stem}.{index:04d}{path.suffix}")


def _part_numbers(path: Path) -> list[int]:
    """Numbers of the files ``NAME.NNNN.EXT`` next to ``path``, sorted (gaps included)."""
    pattern = re.compile(re.escape(path.stem) + r"\.(\d{4})" + re.escape(path.suffix) + "$")
    try:
        names = os.listdir(path.parent)
    except OSError:
        return []
    return sorted(int(m.group(1)) for m in map(pattern.match, names) if m and int(m.group(1)))


def _set_paths(path: Path) -> list[Path]:
    """The files of the recording ``path``, checked for a missing first file or a gap."""
    paths = recording_paths(path)
    if not path.exists():
        raise RecordingError(f"{path}: no such recording")
    numbers = _part_numbers(path)
    if numbers and numbers[-1] > len(paths) - 1:
        missing = len(paths)
        raise RecordingError(f"{path}: part {missing} ({_rotated(path, missing).name}) is "
                             f"missing but part {numbers[-1]} exists; the set is incomplete")
    return paths


def _link_new(source: Path, target: Path) -> bool:
    """Give ``source`` the name ``target`` unless it exists; True when ``source`` remains.

    A hard link fails atomically on an existing target. On a file system without hard links the
    rename that replaces it is checked first, which leaves a short race with another writer.
    """
    try:
        os.link(source, target)
        return True
    except FileExistsError:
        raise
    except OSError as exc:
        if exc.errno not in _NO_LINKS:
            raise
    if os.path.lexists(target):
        raise FileExistsError(errno.EEXIST, "File exists", str(target))
    os.rename(source, target)
    return False


def _fsync_directory(folder: Path) -> None:
    """fsync a directory so a new name in it survives a machine crash (POSIX only)."""
    if os.name != "posix":
        return
    fd = os.open(folder, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _unlink_quietly(path: Path) -> None:
    try:
        os.unlink(path)
    except OSError as exc:
        log.debug("%s: could not remove: %s", path, exc)


def _close_quietly(f: BinaryIO) -> OSError | None:
    """Close ``f``; the OSError of its last flush, if any, is returned, not raised."""
    try:
        f.close()
    except OSError as exc:
        return exc
    return None


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

    Attributes
    ----------
    records : int
        Records written (meta records not counted).
    skipped : int
        Records not written because their topic is off.
    error : RecordingError or None
        The write failure that stopped this recording (see :attr:`failed`).

    Raises
    ------
    RecordingError
        When the file exists or cannot be created, or its first bytes cannot be written (then
        no file is left under ``path``); names the path.

    Notes
    -----
    The magic and the meta record of each file are written to a temporary name in the same
    folder and linked to the final name only once they are on disk, so a full disk at start
    leaves nothing that would block the next start.
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
        self.error: RecordingError | None = None
        self._closed = False
        self._open(self.path)

    @property
    def current_path(self) -> Path:
        """The file being written now (differs from ``path`` after a rotation)."""
        return self.path if self._index == 0 else _rotated(self.path, self._index)

    @property
    def failed(self) -> bool:
        """True once a write failed; the recording is then stopped for good."""
        return self.error is not None

    def _open(self, path: Path) -> None:
        exists = RecordingError(f"{path}: exists already; recordings are never overwritten")
        if os.path.lexists(path):
            raise exists
        meta = {"format": "brimline record log", "version": 1, "brimline": __version__,
                "created_utc": datetime.datetime.now(datetime.timezone.utc).isoformat(),
                "part": self._index, **self._meta}
        head = MAGIC + pack_record(codec.encode(TOPIC_META, meta))
        temp = path.with_name(f".{path.name}.{os.getpid()}.{uuid.uuid4().hex[:8]}.part")
        try:
            f = open(temp, "xb")
        except OSError as exc:
            raise RecordingError(f"{path}: cannot start recording: {exc}") from exc
        placed = False  # True once the file has its final name
        try:
            f.write(head)
            f.flush()
            if self.fsync:
                os.fsync(f.fileno())
            temp_remains = _link_new(temp, path)
            placed = True
            if self.fsync:
                _fsync_directory(path.parent)
        except OSError as exc:
            _close_quietly(f)
            if placed:
                _unlink_quietly(path)
            if not placed or temp_remains:
                _unlink_quietly(temp)
            if isinstance(exc, FileExistsError):
                raise exists from None
            raise RecordingError(f"{path}: cannot start recording: {exc}") from exc
        if temp_remains:
            _unlink_quietly(temp)
        self._file = f
        self._size = len(head)

    def _put(self, data: bytes) -> None:
        if self.error is not None:
            raise RecordingError(f"recording stopped: {self.error}")
        try:
            self._file.write(data)
            self._file.flush()
            if self.fsync:
                os.fsync(self._file.fileno())
        except OSError as exc:
            self._fail(f"write failed after {self.records} records: {exc}", exc)
        self._size += len(data)

    def _fail(self, what: str, exc: OSError | RecordingError) -> None:
        """Mark the recording failed, release the file, raise the error (once)."""
        if isinstance(exc, RecordingError):
            self.error = exc
        else:
            self.error = RecordingError(f"{self.current_path}: {what}")
        if self._file is not None:
            f, self._file = self._file, None
            late = _close_quietly(f)
            if late is not None:
                log.debug("%s: closing after the failure: %s", self.current_path, late)
        if exc is self.error:
            raise self.error
        raise self.error from exc

    def wants(self, topic: str) -> bool:
        """True when ``topic`` is recorded."""
        return self.topics is None or topic in self.topics

    def write(self, topic: str, record: Any) -> bool:
        """Encode and append ``record`` on ``topic``; False (counted) when the topic is off.

        Raises
        ------
        RecordingError
            When the write fails (disk full, device gone), and for every write after that.
        RuntimeError
            After :meth:`close`.
        """
        if not self.wants(topic):
            self._check_open()
            self.skipped += 1
            return False
        return self.write_frames(codec.encode(topic, record))

    def write_frames(self, frames: Sequence[Any]) -> bool:
        """Append an already encoded message (e.g. what ``MapPublisher.publish`` returned).

        Raises as :meth:`write` does.
        """
        self._check_open()
        topic = bytes(codec.byte_view(frames[0])).decode("ascii", "replace")
        if not self.wants(topic):
            self.skipped += 1
            return False
        if self.error is None and self.max_bytes is not None and self._size >= self.max_bytes:
            self._rotate()
        self._put(pack_record(frames))
        self.records += 1
        return True

    def _rotate(self) -> None:
        f, self._file = self._file, None
        late = _close_quietly(f)
        if late is not None:
            self._fail(f"write failed after {self.records} records: {late}", late)
        self._index += 1
        try:
            self._open(_rotated(self.path, self._index))
        except RecordingError as exc:
            self._fail("", exc)

    def _check_open(self) -> None:
        if self._closed:
            raise RuntimeError(f"RecordWriter for {self.path} is closed")

    def close(self) -> None:
        """Flush and close the file. Idempotent.

        Raises
        ------
        RecordingError
            When the final flush or close fails and no failure was reported before (once; a
            failed writer's ``close`` only releases the file). Never a raw ``OSError``.
        """
        if self._closed:
            return
        self._closed = True
        if self._file is None:
            return
        f, self._file = self._file, None
        err = None
        try:
            f.flush()
            if self.fsync:
                os.fsync(f.fileno())
        except OSError as exc:
            err = exc
        late = _close_quietly(f)
        err = err or late
        if err is not None:
            self.error = RecordingError(f"{self.current_path}: closing failed after "
                                        f"{self.records} records: {err}")
            raise self.error from err

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
        1 when the file ended in a torn record (after iteration reached it), else 0. The torn
        record is also logged once as a warning on the ``brimline.recording`` logger.

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
            self._file: BinaryIO = open(self.path, "rb", buffering=_READ_BUFFER)
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
        log.warning("%s: record %d is torn (%s); stopped there", self.path, number, what)
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


class RecordSetReader:
    """Reads a recording and its rotated continuations as one stream of ``(topic, record)``.

    Parameters
    ----------
    path : str or Path
        The first file of the recording (``NAME.EXT``); ``NAME.0001.EXT``, ... follow it.
    topics : iterable of str or None
        Yield only these topics (``meta`` records are never yielded).

    Attributes
    ----------
    paths : list of Path
        The files of the set, in order (listed at open).
    meta : dict
        The ``meta`` record of the first file.
    records : int
        Records read so far over all files (each file's meta record included).
    torn : int
        Files whose last record was torn, so far (each is logged as :class:`RecordReader` does).

    Raises
    ------
    RecordingError
        At open: the first file is missing, a part is missing before a later one, or the first
        file is not a recording. While iterating: as :class:`RecordReader` does, for any file.

    Notes
    -----
    Each iteration walks the whole set from its first file again; the counters add up.
    """

    def __init__(self, path: str | Path, *, topics: Iterable[str] | None = None) -> None:
        self.path = Path(path)
        self.topics = None if topics is None else frozenset(topics)
        self.paths = _set_paths(self.path)
        self.records = 0
        self.torn = 0
        self._closed = False
        self._reader: RecordReader | None = RecordReader(self.paths[0], topics=self.topics)
        self.meta = self._reader.meta

    def __iter__(self) -> Iterator[tuple[str, Any]]:
        self._check_open()
        for p in self.paths:
            if self._reader is None:
                self._reader = RecordReader(p, topics=self.topics)
            reader = self._reader
            try:
                yield from reader
            finally:
                self.records += reader.records
                self.torn += reader.torn
                reader.close()
                self._reader = None

    def _check_open(self) -> None:
        if self._closed:
            raise RuntimeError(f"RecordSetReader for {self.path} is closed")

    def close(self) -> None:
        """Close the file being read. Idempotent."""
        if not self._closed:
            self._closed = True
            if self._reader is not None:
                self._reader.close()
                self._reader = None

    def __enter__(self):
        return self

    def __exit__(self, *exc) -> None:
        self.close()
