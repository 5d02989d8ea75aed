"""The transmitter's side of the map protocol: follow the daemon's maps safely.

A :class:`Follower` subscribes to ``map`` and ``heartbeat`` first, then asks for a snapshot, so
no update can fall between the two. Updates that arrive before the snapshot reply are held and
then applied only if newer than the snapshot. Every map is checked (:func:`check_map`) before it
is handed on; a bad one is refused with a counted reason and the last good map stays in force.
A jump in ``seq`` (a lost update) or a heartbeat announcing a newer ``seq`` than the one held
triggers a new snapshot; no heartbeat within ``heartbeat_timeout_s`` makes :meth:`Follower.stale`
true (the publisher is presumed dead; the transmitter decides what to do, e.g. a safe map).

Within an epoch ``seq`` only grows: an older or equal ``seq`` is dropped, and a refused map still
uses up its ``seq``; a map of a new epoch (the daemon started afresh) starts a new order, while a
refused map of another epoch changes nothing.

Time comes from an injectable clock (default :func:`time.monotonic`), so tests need no sleeps.

Whatever arrives, :meth:`Follower.poll` never raises for it: a message the codec refuses (or a
record of a type these sockets never carry) is dropped and counted by socket (``maps`` for the
SUB, ``snapshots`` for the DEALER) and reason in :attr:`Follower.protocol_errors`, with at most
one logged warning per reason every 10 s. Both receiving sockets refuse frames larger than
:func:`~brimline.daemon.wire.codec.max_frame_bytes` for the plan (1 MiB up to 65536 tones).
"""

from __future__ import annotations

import collections
import logging
import math
import time
from pathlib import Path
from types import MappingProxyType
from typing import Callable, Iterable, Sequence

import numpy as np
import zmq

from brimline.daemon.core.loading import allowed_bits
from brimline.daemon.errors import InputError, ProtocolError
from brimline.daemon.limits import POSITIVE, check_values
from brimline.daemon.net.curve import apply_client
from brimline.daemon.net.drops import DropCounter, limit_inbound
from brimline.daemon.records import LoadMap, TonePlan
from brimline.daemon.wire import codec

__all__ = ["Follower", "check_map", "FOLLOWER_LIMITS"]

_MAX_HELD = 256  # updates held while a snapshot is awaited (newest kept)
_MAX_PER_POLL = 256  # messages handled per poll call
_TYPES = frozenset({"load_map", "dict"})  # what the map and snapshot sockets carry

log = logging.getLogger("brimline.follower")

#: Limits of :class:`Follower`'s numeric keyword arguments (it has no config section of its own).
FOLLOWER_LIMITS = MappingProxyType({
    "heartbeat_timeout_s": POSITIVE,
    "snapshot_timeout_s": POSITIVE,
})


def check_map(load_map: LoadMap, *, plan_id: str, tone_index: np.ndarray,
              bits: Iterable[int], budget_lin: float, cap_lin: float,
              tolerance: float = 1e-3) -> str | None:
    """Check a map against what the transmitter can do; return None if usable, else why not.

    Parameters
    ----------
    load_map : LoadMap
        The map to check.
    plan_id : str
        The transmitter's tone plan id.
    tone_index : ndarray
        The plan's data tones, in order.
    bits : iterable of int
        Allowed bits per tone (a constellation set, including 0).
    budget_lin : float
        Largest total power, linear, in units of the nominal per-tone power (N tones at
        nominal is N).
    cap_lin : float
        Largest power on one tone, linear (``inf`` for none).
    tolerance : float
        Relative slack on the budget and cap, for float32 rounding (0.1 % by default, a
        common-practice allowance, far above float32 precision).

    Returns
    -------
    str or None
        A short reason key (``plan_id``, ``tone_index``, ``bits``, ``total_bits``,
        ``power_not_finite``, ``power_negative``, ``power_on_unloaded_tone``,
        ``no_power_on_loaded_tone``, ``over_budget``, ``over_cap``) or None.
    """
    if load_map.plan_id != plan_id:
        return "plan_id"
    if load_map.tone_index.shape != np.shape(tone_index) or not np.array_equal(
            load_map.tone_index, tone_index):
        return "tone_index"
    allowed = np.zeros(256, dtype=bool)
    allowed[np.asarray(list(bits), dtype=np.int64)] = True
    b = load_map.bits
    if not allowed[b].all():
        return "bits"
    if int(b.sum(dtype=np.int64)) != load_map.total_bits:
        return "total_bits"
    p = load_map.power_lin.astype(np.float64)
    if not np.isfinite(p).all():
        return "power_not_finite"
    if (p < 0).any():
        return "power_negative"
    if (p[b == 0] != 0).any():
        return "power_on_unloaded_tone"
    if (p[b > 0] <= 0).any():
        return "no_power_on_loaded_tone"
    if p.sum() > budget_lin * (1 + tolerance):
        return "over_budget"
    if p.size and p.max() > cap_lin * (1 + tolerance):
        return "over_cap"
    return None


def _recv_nowait(socket: zmq.Socket):
    """One message from ``socket`` without waiting (frames, uncopied), or None."""
    try:
        return socket.recv_multipart(flags=zmq.NOBLOCK, copy=False)
    except zmq.Again:
        return None


class Follower:
    """Follows a daemon's maps for a transmitter.

    Parameters
    ----------
    plan : TonePlan
        The transmitter's tone plan; maps for another plan or other tones are refused.
    map_endpoint, snapshot_endpoint : str
        The daemon's map PUB and snapshot ROUTER (``tcp://127.0.0.1:7341`` / ``:7342``).
    ack_endpoint : str or None
        The daemon's ack PULL (``tcp://127.0.0.1:7344``); None sends no acks.
    bits : iterable of int
        Allowed bits per tone, by the loader's rule (ascending from 0, see
        :func:`brimline.daemon.core.loading.allowed_bits`).
    budget_db : float
        Total power budget relative to N tones at nominal, dB (as ``loading.budget_db``).
    cap_db : float
        Per-tone ceiling relative to nominal, dB (as ``loading.cap_db``).
    tolerance : float
        Relative slack on budget and cap (see :func:`check_map`).
    heartbeat_timeout_s : float
        Silence after which :meth:`stale` is true (a few heartbeat intervals).
    snapshot_timeout_s : float
        A snapshot request unanswered this long is sent again.
    on_map : callable or None
        Called with each map adopted, on the thread that calls :meth:`poll`.
    curve_server_key : str or None
        The daemon's public ``.key`` file; with ``curve_client_key`` turns CURVE on.
    curve_client_key : str or None
        This follower's ``.key_secret`` file.
    context : zmq.Context or None
        Context for the sockets; None makes (and at close terminates) a private one.
    clock : callable
        Seconds, monotonic; used for staleness and snapshot timeouts.

    Attributes
    ----------
    current : LoadMap or None
        The last good map.
    counters : collections.Counter
        ``maps`` (adopted), ``snapshots`` (replies used), ``heartbeats``, ``gaps``,
        ``old_dropped`` (not newer than the map held), ``epoch_changes``, ``acks_sent``,
        ``acks_dropped``, ``malformed``, ``rejected`` and ``rejected:<reason>``.
    drops : DropCounter
        Malformed messages by socket (``maps``, ``snapshots``) and reason;
        :attr:`protocol_errors` is its JSON-ready form.
    last_rejection : str or None
        Reason of the last refused map.
    """

    def __init__(self, *, plan: TonePlan, map_endpoint: str = "tcp://127.0.0.1:7341",
                 snapshot_endpoint: str = "tcp://127.0.0.1:7342",
                 ack_endpoint: str | None = None, bits: Iterable[int] = range(0, 9),
                 budget_db: float = 0.0, cap_db: float = math.inf, tolerance: float = 1e-3,
                 heartbeat_timeout_s: float = 2.0, snapshot_timeout_s: float = 1.0,
                 on_map: Callable[[LoadMap], None] | None = None,
                 curve_server_key: str | Path | None = None,
                 curve_client_key: str | Path | None = None,
                 context: zmq.Context | None = None,
                 clock: Callable[[], float] = time.monotonic) -> None:
        if (curve_server_key is None) != (curve_client_key is None):
            raise ValueError("CURVE needs both curve_server_key and curve_client_key")
        check_values(dict(heartbeat_timeout_s=heartbeat_timeout_s,
                          snapshot_timeout_s=snapshot_timeout_s), FOLLOWER_LIMITS)
        self.plan = plan
        self._plan_id = plan.plan_id
        self._tones = plan.data_tones
        self._bits = list(allowed_bits(bits))
        self._budget_lin = plan.data_tones.size * 10.0 ** (budget_db / 10.0)
        self._cap_lin = 10.0 ** (cap_db / 10.0)
        self._tolerance = float(tolerance)
        self.heartbeat_timeout_s = float(heartbeat_timeout_s)
        self.snapshot_timeout_s = float(snapshot_timeout_s)
        self.on_map = on_map
        self._clock = clock
        self.current: LoadMap | None = None
        self.counters: collections.Counter[str] = collections.Counter()
        self.drops = DropCounter(log, clock=clock)
        self.last_rejection: str | None = None
        self.last_heartbeat: dict | None = None
        self._epoch: str | None = None  # epoch of the order we follow
        self._seq = -1  # last seq seen in that epoch (adopted or announced by a snapshot)
        self._held: collections.deque = collections.deque(maxlen=_MAX_HELD)
        self._snapshot_sent_s: float | None = None
        self._last_heard_s = clock()
        self._closed = False
        self._own_context = context is None
        self.context = zmq.Context() if context is None else context
        self._sockets: list[zmq.Socket] = []
        try:
            max_frame = codec.max_frame_bytes(plan.fft_size)

            def make(kind):
                s = self.context.socket(kind)
                self._sockets.append(s)  # first: an unclosed socket would hang term()
                s.setsockopt(zmq.LINGER, 0)
                limit_inbound(s, max_frame)
                if curve_server_key is not None:
                    try:
                        apply_client(s, server_key_file=curve_server_key,
                                     client_secret_file=curve_client_key)
                    except zmq.ZMQError as exc:
                        raise InputError(f"CURVE keys refused by ZeroMQ: {exc}") from None
                return s

            self._sub = make(zmq.SUB)
            self._sub.setsockopt(zmq.SUBSCRIBE, codec.TOPIC_MAP.encode())
            self._sub.setsockopt(zmq.SUBSCRIBE, codec.TOPIC_HEARTBEAT.encode())
            self._sub.connect(map_endpoint)
            self._req = make(zmq.DEALER)
            self._req.setsockopt(zmq.SNDHWM, 4)
            self._req.connect(snapshot_endpoint)
            self._ack = None
            if ack_endpoint is not None:
                self._ack = make(zmq.PUSH)
                self._ack.setsockopt(zmq.SNDHWM, 100)
                self._ack.connect(ack_endpoint)
            self._poller = zmq.Poller()
            self._poller.register(self._sub, zmq.POLLIN)
            self._poller.register(self._req, zmq.POLLIN)
        except BaseException:
            self.close()
            raise
        self._request_snapshot()

    @classmethod
    def for_daemon(cls, publish, loading, *, plan: TonePlan, **kwargs) -> "Follower":
        """A follower of the daemon configured by ``publish`` and ``loading`` sections.

        Endpoints come from ``publish`` (a wildcard host becomes 127.0.0.1), the allowed bits,
        budget and cap from ``loading``, ``heartbeat_timeout_s`` defaults to four heartbeat
        intervals. ``kwargs`` override or add any constructor argument (``on_map``,
        ``context``, CURVE key files, ``clock``).
        """
        def here(ep):
            if ep is None:
                return None
            for wild in ("tcp://*:", "tcp://0.0.0.0:"):
                if ep.startswith(wild):
                    return "tcp://127.0.0.1:" + ep[len(wild):]
            return ep
        args = dict(plan=plan, map_endpoint=here(publish.map_endpoint),
                    snapshot_endpoint=here(publish.snapshot_endpoint),
                    ack_endpoint=here(publish.ack_endpoint), bits=list(loading.bits),
                    budget_db=loading.budget_db, cap_db=loading.cap_db,
                    heartbeat_timeout_s=4 * publish.heartbeat_s)
        args.update(kwargs)
        return cls(**args)

    # ------------------------------------------------------------------ public

    @property
    def synced(self) -> bool:
        """True once a snapshot reply has been used (and no new one is awaited)."""
        return self._snapshot_sent_s is None and self._epoch is not None

    @property
    def held_updates(self) -> int:
        """Map updates received while a snapshot reply is awaited (applied after it if newer)."""
        return len(self._held)

    @property
    def protocol_errors(self) -> dict[str, dict[str, int]]:
        """Dropped messages: ``{socket: {reason: n}}`` (sockets ``maps`` and ``snapshots``)."""
        return self.drops.counts()

    def stale(self, now_s: float | None = None) -> bool:
        """True when nothing was heard from the daemon for ``heartbeat_timeout_s``."""
        now = self._clock() if now_s is None else now_s
        return now - self._last_heard_s > self.heartbeat_timeout_s

    def poll(self, timeout_s: float = 0.0) -> LoadMap | None:
        """Wait up to ``timeout_s`` for traffic, handle all of it, return the newest map
        adopted in this call (None if none).

        Never raises for bad traffic: malformed messages and refused maps are counted.
        """
        self._check_open()
        now = self._clock()
        if self._snapshot_sent_s is not None and now - self._snapshot_sent_s > \
                self.snapshot_timeout_s:
            self._request_snapshot()
        adopted = None
        events = dict(self._poller.poll(max(0, int(math.ceil(timeout_s * 1000)))))
        for _ in range(_MAX_PER_POLL):
            reply = _recv_nowait(self._req) if self._req in events else None
            if reply is not None:
                adopted = self._on_snapshot(reply) or adopted
            update = _recv_nowait(self._sub)
            if update is not None:
                adopted = self._on_update(update) or adopted
            if reply is None and update is None:
                break
            events = {self._req: zmq.POLLIN}
        return adopted

    def ack(self, frame: int, time_s: float, seq: int | None = None) -> bool:
        """Tell the daemon the transmitter applied map ``seq`` (default: the current one) from
        ``frame`` at ``time_s``. Non-blocking; returns False when not sent (counted)."""
        self._check_open()
        if self._ack is None:
            return False
        cur = self.current
        if seq is None:
            if cur is None:
                return False
            seq = cur.seq
        body = {"epoch": cur.epoch if cur is not None else "", "seq": int(seq),
                "frame": int(frame), "time_s": float(time_s)}
        try:
            self._ack.send_multipart(codec.encode(codec.TOPIC_ACK, body), flags=zmq.NOBLOCK)
        except zmq.Again:
            self.counters["acks_dropped"] += 1
            return False
        self.counters["acks_sent"] += 1
        return True

    def close(self) -> None:
        """Close the sockets (LINGER 0) and a private context. Idempotent."""
        if self._closed:
            return
        self._closed = True
        for s in self._sockets:
            s.close()
        self._sockets.clear()
        if self._own_context:
            self.context.term()

    def __enter__(self):
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    # ------------------------------------------------------------------ internals

    def _check_open(self) -> None:
        if self._closed:
            raise RuntimeError("Follower is closed")

    def _request_snapshot(self) -> None:
        try:
            self._req.send_multipart([b"", codec.SNAPSHOT_REQUEST], flags=zmq.NOBLOCK)
        except zmq.Again:
            pass  # queue full (daemon away); retried after snapshot_timeout_s
        self.counters["snapshot_requests"] += 1
        self._snapshot_sent_s = self._clock()

    def _decode(self, frames: Sequence, socket: str) -> tuple[str, object] | None:
        try:
            return codec.decode(frames, types=_TYPES)
        except ProtocolError as exc:
            self._malformed(socket, exc.reason, str(exc))
            return None

    def _malformed(self, socket: str, reason: str, detail: str) -> None:
        self.counters["malformed"] += 1
        self.last_rejection = f"malformed: {detail}"
        self.drops.drop(socket, reason, detail)

    def _reject(self, reason: str) -> None:
        self.counters["rejected"] += 1
        self.counters[f"rejected:{reason}"] += 1
        self.last_rejection = reason

    def _adopt(self, load_map: LoadMap) -> LoadMap | None:
        reason = check_map(load_map, plan_id=self._plan_id, tone_index=self._tones,
                           bits=self._bits, budget_lin=self._budget_lin,
                           cap_lin=self._cap_lin, tolerance=self._tolerance)
        if reason is not None:
            self._reject(reason)
            return None
        self.current = load_map
        self.counters["maps"] += 1
        if self.on_map is not None:
            self.on_map(load_map)
        return load_map

    def _on_snapshot(self, frames: Sequence) -> LoadMap | None:
        if len(frames) and len(frames[0]) == 0:
            frames = frames[1:]  # the empty delimiter
        decoded = self._decode(frames, "snapshots")
        if decoded is None:
            return None
        self._last_heard_s = self._clock()
        topic, record = decoded
        if topic != codec.TOPIC_SNAPSHOT:
            self._malformed("snapshots", "topic", f"topic {topic[:20]!r} on the snapshot socket")
            return None
        if isinstance(record, dict) and "error" in record:
            self.counters["snapshot_errors"] += 1  # still pending: resent after the timeout
            self.last_rejection = f"snapshot refused: {record['error']}"
            return None
        self._snapshot_sent_s = None
        self.counters["snapshots"] += 1
        adopted = None
        if isinstance(record, LoadMap):
            if record.epoch != self._epoch or record.seq > self._seq:
                adopted = self._take(record)
            else:
                self.counters["old_dropped"] += 1
        elif (isinstance(record, dict) and isinstance(record.get("seq"), int)
              and isinstance(record.get("epoch"), str)):
            if record.get("epoch") != self._epoch:  # no map yet in that epoch
                self._epoch, self._seq = record.get("epoch"), record["seq"]
        held, self._held = list(self._held), collections.deque(maxlen=_MAX_HELD)
        for m in held:  # updates that raced the snapshot: only newer ones count
            adopted = self._follow(m) or adopted
        return adopted

    def _on_update(self, frames: Sequence) -> LoadMap | None:
        decoded = self._decode(frames, "maps")
        if decoded is None:
            return None
        self._last_heard_s = self._clock()
        topic, record = decoded
        if topic == codec.TOPIC_HEARTBEAT and isinstance(record, dict):
            self.counters["heartbeats"] += 1
            self.last_heartbeat = record
            seq, epoch = record.get("seq"), record.get("epoch")
            if self._snapshot_sent_s is None and isinstance(seq, int) and (
                    epoch != self._epoch or seq > self._seq):
                self.counters["behind"] += 1
                self._request_snapshot()
            return None
        if topic == codec.TOPIC_MAP and isinstance(record, LoadMap):
            if self._snapshot_sent_s is not None:
                self._held.append(record)
                return None
            return self._follow(record)
        self._malformed("maps", "topic", f"a {type(record).__name__} on topic {topic[:20]!r}")
        return None

    def _follow(self, load_map: LoadMap) -> LoadMap | None:
        same = load_map.epoch == self._epoch
        if same and load_map.seq <= self._seq:
            self.counters["old_dropped"] += 1
            return None
        if same and load_map.seq > self._seq + 1:
            self.counters["gaps"] += 1
            self._request_snapshot()
        return self._take(load_map)

    def _take(self, load_map: LoadMap) -> LoadMap | None:
        """Check and adopt a map already known to be newer. Within the epoch the seq is used
        up even when the map is refused; a refused map of another epoch moves nothing."""
        same = load_map.epoch == self._epoch
        adopted = self._adopt(load_map)
        if adopted is not None or same:
            if not same and self._epoch:  # "" / None: the daemon had not named its epoch
                self.counters["epoch_changes"] += 1
            self._epoch, self._seq = load_map.epoch, load_map.seq
        return adopted
