"""The daemon's saved state: epoch, sequence-number lease and last map, saved atomically.

Sequence numbers are leased. The state file records, besides the last map, ``seq_ceiling``: the
highest ``seq`` the daemon may publish before it has durably saved a higher ceiling. A restart
therefore continues at ``seq_ceiling + 1`` (:attr:`SavedState.next_seq`), above every seq a
crashed run could have published, however stale its saved map is. Gaps are harmless: a follower
treats one as "use the map, ask for a snapshot".

:class:`StateStore` is the file. Its layout is a two-record recording
(:mod:`brimline.daemon.wire.recording` layout, magic and per-record CRC included):

1. a dict on topic ``state``: ``{"epoch": str, "seq_ceiling": int}``;
2. optionally the last :class:`~brimline.daemon.records.LoadMap` on topic ``map`` (the same
   bytes the map publisher sent), of the same epoch, with ``seq <= seq_ceiling``.

:meth:`StateStore.save` writes a temporary file in the same directory, fsyncs it, renames it
over the old one with :func:`os.replace` (atomic on POSIX and Windows) and fsyncs the directory,
so after a crash at any point either the old or the new state loads, never a mixture.

:class:`StateKeeper` is what a running daemon uses: :meth:`StateKeeper.reserve` before each
publish (free while the seq is under the saved ceiling; otherwise a synchronous save of a new
ceiling, once per ``lease`` maps), :meth:`StateKeeper.submit` after it (the map is saved lazily
by a writer thread, which also renews the lease ahead of need so the synchronous save is rare).
"""

from __future__ import annotations

import logging
import os
import tempfile
import threading
import uuid
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Sequence

from brimline.daemon.errors import BrimlineError, ProtocolError, StateError
from brimline.daemon.records import LoadMap
from brimline.daemon.wire import codec
from brimline.daemon.wire.recording import MAGIC, pack_record, unpack_record

__all__ = ["SavedState", "StateStore", "StateKeeper", "new_epoch", "TOPIC_STATE", "LEASE"]

TOPIC_STATE = "state"
LEASE = 256  #: sequence numbers reserved by one durable save (a restart skips at most this)

log = logging.getLogger("brimline.state")


def new_epoch() -> str:
    """A fresh epoch id: 16 hex digits from uuid4 (64 random bits)."""
    return uuid.uuid4().hex[:16]


@dataclass(frozen=True)
class SavedState:
    """What a restart continues from.

    Attributes
    ----------
    epoch : str
        Epoch id.
    seq_ceiling : int
        Highest sequence number the saved run may have published.
    load_map : LoadMap or None
        The last map saved (None when no map was saved yet).
    """

    epoch: str
    seq_ceiling: int
    load_map: LoadMap | None = None

    @property
    def seq(self) -> int:
        """Sequence number of the saved map (-1 when there is none)."""
        return -1 if self.load_map is None else self.load_map.seq

    @property
    def next_seq(self) -> int:
        """The first sequence number a restart may use: ``seq_ceiling + 1``."""
        return self.seq_ceiling + 1


class StateStore:
    """Load and atomically save the daemon state at ``path``.

    Parameters
    ----------
    path : str or Path
        State file. Its folder (and any missing parents) is made by this store's first save,
        readable by its owner only (the state names the daemon's epoch and lease); a folder
        that vanishes later is a failed save, not made again (that would hide a lost volume).
    fsync : bool
        fsync the file and the directory on save (default True; tests of speed may turn it off).
    """

    def __init__(self, path: str | Path, *, fsync: bool = True) -> None:
        self.path = Path(path)
        self.fsync = bool(fsync)
        self._saved = False

    def load(self) -> SavedState | None:
        """The saved state, or None when there is no state file.

        Raises
        ------
        StateError
            When the file exists but cannot be read, is truncated or corrupt, or its records
            disagree; names the path. (The service decides whether to start fresh.)
        """
        try:
            data = self.path.read_bytes()
        except FileNotFoundError:
            return None
        except OSError as exc:
            raise StateError(f"{self.path}: cannot read state: {exc}") from None
        if not data.startswith(MAGIC):
            raise StateError(f"{self.path}: not a brimline state file (bad magic)")
        messages = []
        pos = len(MAGIC)
        while pos < len(data):
            if len(messages) == 2:
                raise StateError(f"{self.path}: state file has data after its two records")
            frames, pos = unpack_record(data, pos)
            if frames is None:
                raise StateError(f"{self.path}: state file is truncated or corrupt (length, "
                                 f"checksum or frame layout)")
            try:
                messages.append(codec.decode(frames))
            except ProtocolError as exc:
                raise StateError(f"{self.path}: {exc}") from None
        if not messages:
            raise StateError(f"{self.path}: state file is truncated")
        topic, head = messages[0]
        if (topic != TOPIC_STATE or not isinstance(head, dict)
                or not isinstance(head.get("epoch"), str)
                or type(head.get("seq_ceiling")) is not int):
            raise StateError(f"{self.path}: first record is not a state record with epoch and "
                             f"seq_ceiling (topic {topic!r})")
        load_map = None
        if len(messages) == 2:
            topic, load_map = messages[1]
            if topic != codec.TOPIC_MAP or not isinstance(load_map, LoadMap):
                raise StateError(f"{self.path}: second record holds {topic!r}, not a map")
            _check(load_map, head["epoch"], head["seq_ceiling"], StateError, f"{self.path}: ")
        return SavedState(head["epoch"], head["seq_ceiling"], load_map)

    def save(self, epoch: str, seq_ceiling: int, load_map: LoadMap | None = None, *,
             map_frames: Sequence[Any] | None = None) -> None:
        """Atomically replace the saved state.

        Parameters
        ----------
        epoch : str
            Epoch id.
        seq_ceiling : int
            Highest seq that may be published before the next save.
        load_map : LoadMap, optional
            The last map (same epoch, ``seq <= seq_ceiling``).
        map_frames : sequence of bytes, optional
            ``load_map`` already encoded on topic ``map`` (what the publisher sent), so it is
            not encoded twice.

        Raises
        ------
        ValueError
            When the map does not belong under this epoch and ceiling (a caller's bug).
        StateError
            When the file cannot be written; the previous state is left intact.
        """
        if load_map is not None:
            _check(load_map, epoch, seq_ceiling, ValueError, "")
            if map_frames is None:
                map_frames = codec.encode(codec.TOPIC_MAP, load_map)
        data = MAGIC + pack_record(codec.encode(
            TOPIC_STATE, {"epoch": epoch, "seq_ceiling": int(seq_ceiling)}))
        if load_map is not None:
            data += pack_record(map_frames)
        d = self.path.parent
        tmp = None
        try:
            if not self._saved:
                d.mkdir(mode=0o700, parents=True, exist_ok=True)
            fd, tmp = tempfile.mkstemp(dir=d, prefix=f".{self.path.name}.", suffix=".tmp")
            with os.fdopen(fd, "wb") as f:
                f.write(data)
                f.flush()
                if self.fsync:
                    os.fsync(f.fileno())
            os.replace(tmp, self.path)
            tmp = None
            self._saved = True
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


def _check(load_map: LoadMap, epoch: str, seq_ceiling: int, error: type, prefix: str) -> None:
    if load_map.epoch != epoch or load_map.seq > seq_ceiling:
        raise error(f"{prefix}map seq={load_map.seq} of epoch {load_map.epoch} does not fit "
                    f"under epoch {epoch} with seq_ceiling={seq_ceiling}")


class StateKeeper:
    """A running daemon's state file: the seq lease (durable before use) and the last map (lazy).

    Parameters
    ----------
    store : StateStore
        The file.
    lease : int
        Sequence numbers reserved per durable save (the ceiling becomes ``seq + lease``).
    min_interval_s : float
        Least time between two lazy saves of the map by the writer thread, s (a burst of maps
        costs one save, not one each).

    Notes
    -----
    Use :meth:`restore` once, then for every map ``reserve(seq)`` before publishing it and
    ``submit(map, frames)`` after. All saves go through one lock, each writing the newest map
    with the highest ceiling reserved, so no save can lower the ceiling on disk. The writer
    thread renews the lease when less than half of it is left, so :meth:`reserve` normally
    finds the seq already covered and returns at once. ``close(last)`` stops the thread and
    saves ``last`` synchronously. Idempotent.
    """

    def __init__(self, store: StateStore, *, lease: int = LEASE,
                 min_interval_s: float = 0.1) -> None:
        if lease < 1:
            raise ValueError(f"lease={lease} must be >= 1")
        self.store = store
        self.lease = int(lease)
        self.min_interval_s = float(min_interval_s)
        self.errors = 0  #: failed lazy saves (logged)
        self.epoch = ""
        self.ceiling = -1  #: highest seq covered by a durable save
        # Newest map and its encoded frames (or None), one tuple so a reader never mixes two.
        self._latest: tuple[LoadMap | None, Sequence[Any] | None] = (None, None)
        self._pending = False
        self._lock = threading.Lock()  # one save at a time
        self._cond = threading.Condition()
        self._stop = False
        self._closed = False
        self._thread: threading.Thread | None = None

    def restore(self) -> tuple[str, int, LoadMap | None]:
        """Load the file (or start a fresh epoch), reserve the first lease, start the writer.

        Returns
        -------
        tuple
            ``(epoch, next_seq, saved map or None)``; ``next_seq`` is above every seq any
            earlier run of this epoch may have published.

        Raises
        ------
        StateError
            When the file is damaged or the first lease cannot be saved.
        """
        saved = self.store.load()
        if saved is None:
            self.epoch, next_seq = new_epoch(), 0
        else:
            self.epoch, next_seq = saved.epoch, saved.next_seq
            self._latest = (saved.load_map, None)
        self.ceiling = next_seq - 1
        self.reserve(next_seq)
        self._thread = threading.Thread(target=self._main, name="brimline-state", daemon=True)
        self._thread.start()
        return self.epoch, next_seq, self._latest[0]

    def reserve(self, seq: int) -> None:
        """Make sure ``seq`` is covered by a durable ceiling (saving one now if it is not).

        Raises
        ------
        StateError
            When the new ceiling cannot be saved: ``seq`` must not be published.
        """
        if seq <= self.ceiling:
            return
        with self._lock:
            if seq <= self.ceiling:  # the writer renewed meanwhile
                return
            self._save_locked(seq + self.lease)

    def submit(self, load_map: LoadMap, frames: Sequence[Any] | None = None) -> None:
        """Hand the newest map (and its encoded frames, if at hand) to the writer thread."""
        with self._cond:
            self._latest = (load_map, frames)
            if not self._pending:
                self._pending = True
                self._cond.notify()

    def _save_locked(self, ceiling: int) -> None:
        m, frames = self._latest
        if m is not None and m.epoch != self.epoch:
            m = frames = None
        self.store.save(self.epoch, ceiling, m, map_frames=frames)
        self.ceiling = ceiling

    def _main(self) -> None:
        while True:
            with self._cond:
                while not self._pending and not self._stop:
                    self._cond.wait()
                if self._stop:
                    return
                self._pending = False
            try:
                with self._lock:
                    m = self._latest[0]
                    newest = m.seq if m is not None else self.ceiling
                    renew = self.ceiling - newest < self.lease // 2
                    self._save_locked(newest + self.lease if renew else self.ceiling)
            except (BrimlineError, ValueError) as exc:  # the thread must not die
                self.errors += 1
                log.error("state not saved: %s", exc)
            with self._cond:  # coalesce: maps submitted meanwhile wait for the next save
                self._cond.wait_for(lambda: self._stop, self.min_interval_s)

    def close(self, last: LoadMap | None = None) -> None:
        """Stop the writer thread, then save ``last`` (or the newest map) synchronously.

        Errors are logged, not raised (shutdown goes on). Idempotent.
        """
        if self._closed:
            return
        self._closed = True
        with self._cond:
            self._stop = True
            self._cond.notify_all()
        if self._thread is not None:
            self._thread.join(10.0)
        if self._thread is None:
            return  # never restored: nothing to save
        with self._lock:
            if last is not None and last.epoch == self.epoch:
                if last is not self._latest[0]:
                    self._latest = (last, None)
                if last.seq > self.ceiling:  # cannot happen through reserve(); keep it true
                    self.ceiling = last.seq
            try:
                self._save_locked(self.ceiling)
            except BrimlineError as exc:
                log.error("state not saved: %s", exc)
