"""The daemon's sockets: maps, heartbeats, snapshots, acknowledgements, and operator status.

:class:`MapPublisher` owns the map path:

* a PUB socket carrying ``map`` (a :class:`~brimline.daemon.records.LoadMap` per change) and
  ``heartbeat`` (epoch and last seq, every ``heartbeat_s``);
* a ROUTER socket answering ``snapshot`` requests with the current map, so a late joiner or a
  follower that saw a gap catches up at once;
* optionally a PULL socket receiving the transmitter's ``ack`` messages;
* optionally a PULL socket receiving the receiver side's ``outcome`` messages (one
  :class:`~brimline.daemon.records.FrameOutcome` per data frame: good or errored, with the map
  seq and frame number), the input of the outer margin loop. Anything else arriving there (a
  wrong topic, a wrong record, bytes that do not decode, a message over 64 KiB) is dropped and
  counted as ``bad_outcomes``.

:class:`StatusPublisher` is a separate PUB with a small send high-water mark, so a stalled
operator's terminal can never hold up the map path.

There are no hidden threads (apart from pyzmq's CURVE authenticator when client authorisation is
on): the service registers :attr:`MapPublisher.snapshot_socket` and :attr:`MapPublisher.ack_socket`
in its one ``zmq.Poller`` and calls :meth:`MapPublisher.handle_snapshot` /
:meth:`MapPublisher.poll_acks` when they are readable. All sends are non-blocking. Sockets belong
to the thread that uses the publisher.

Hostile input
-------------
Every socket here receives something (PUB sockets receive subscriptions), so every one has a
frame ceiling (:data:`~brimline.daemon.net.drops.SMALL_MESSAGE_BYTES`, 4 KiB: requests, acks
and subscriptions are a few hundred bytes), and the snapshot and ack sockets queue at most 16
messages per peer, so what one peer can make the daemon buffer is bounded. A malformed request
or acknowledgement is dropped and counted in :attr:`MapPublisher.protocol_errors` by socket and
reason (logged at most once per reason every 10 s). An acknowledgement is believed only for a map this publisher sent (or
primed) in its current epoch; any other is counted as ``forged``.
"""

from __future__ import annotations

import collections
import logging
from pathlib import Path
from types import MappingProxyType
from typing import Any, Callable, Mapping

import zmq

from brimline.daemon.errors import InputError, ProtocolError
from brimline.daemon.limits import NON_NEGATIVE, POSITIVE, at_least, check_values
from brimline.daemon.net.curve import CurveServer
from brimline.daemon.net.drops import SMALL_MESSAGE_BYTES, DropCounter, limit_inbound
from brimline.daemon.records import FrameOutcome, LoadMap
from brimline.daemon.wire import codec

__all__ = ["MapPublisher", "StatusPublisher", "bind_endpoint", "PUBLISH_LIMITS",
           "STATUS_LIMITS", "check_publish_settings"]

_MAX_PER_CALL = 64  # requests or acks handled per call, so one burst cannot starve the loop
# Messages queued per connected peer on the snapshot and ack sockets: with the 4 KiB frame
# ceiling a peer can make the daemon buffer at most 16 x 4 KiB = 64 KiB (a follower sends one
# ack per map and one request per snapshot, read within a loop step). The queue of a peer
# that has disconnected stays until it is read, so a client that churns connections faster
# than the loop reads (64 messages per step) grows memory by up to that much per connection;
# CURVE client authorisation is what keeps strangers from connecting at all.
_RECEIVE_HWM = 16

log = logging.getLogger("brimline.publisher")

_MAX_OUTCOME_BYTES = 64 * 1024  # an outcome is a few hundred bytes; larger is refused by zmq

#: Limits of :class:`MapPublisher`'s numeric keyword arguments, checked by the constructor and
#: by the ``publish:`` config section alike; the rule between keys is
#: :func:`check_publish_settings`'s.
PUBLISH_LIMITS = MappingProxyType({
    "heartbeat_s": POSITIVE,
    "map_hwm": at_least(1),
    "linger_s": NON_NEGATIVE,
})

#: Limits of :class:`StatusPublisher`'s numeric keyword arguments (the ``status:`` section).
STATUS_LIMITS = MappingProxyType({
    "rate_hz": POSITIVE,
    "hwm": at_least(1),
})


def check_publish_settings(settings: Mapping[str, Any], *, prefix: str = "") -> None:
    """Check :class:`MapPublisher` settings: each against :data:`PUBLISH_LIMITS`, then that
    ``curve_clients_dir`` comes with ``curve_secret_key``.

    Raises
    ------
    ValueError
        Naming the key and value (``publish.heartbeat_s=0 must be a positive finite number``).
    """
    check_values(settings, PUBLISH_LIMITS, prefix=prefix)
    if settings.get("curve_clients_dir") is not None \
            and settings.get("curve_secret_key") is None:
        raise ValueError(f"{prefix}curve_clients_dir needs {prefix}curve_secret_key")


def bind_endpoint(socket: zmq.Socket, endpoint: str) -> str:
    """Bind ``socket`` to ``endpoint`` and return the endpoint actually bound.

    A TCP port of ``0`` or ``*`` picks a free port (``tcp://127.0.0.1:0``).

    Raises
    ------
    ProtocolError
        When the bind fails (address in use, bad endpoint); names the endpoint.
    """
    ep = endpoint
    if ep.startswith("tcp://") and ep.endswith(":0"):
        ep = ep[:-2] + ":*"
    try:
        socket.bind(ep)
    except zmq.ZMQError as exc:
        raise ProtocolError(f"cannot bind {endpoint}: {exc}") from None
    return socket.getsockopt(zmq.LAST_ENDPOINT).decode()


def _is_int(value: Any) -> bool:
    return isinstance(value, int) and not isinstance(value, bool)


class _Sockets:
    """Context ownership and ordered, idempotent shutdown shared by both publishers."""

    def __init__(self, context: zmq.Context | None, linger_s: float) -> None:
        NON_NEGATIVE.check("linger_s", linger_s)
        self._own_context = context is None
        self.context = zmq.Context() if context is None else context
        self._linger_ms = int(round(linger_s * 1000))
        self._sockets: list[zmq.Socket] = []
        self._closed = False

    def _socket(self, kind: int, curve: CurveServer | None) -> zmq.Socket:
        s = self.context.socket(kind)
        # Listed before anything can fail: a socket left open makes context.term() wait
        # for ever (how a bad key once hung the daemon).
        self._sockets.append(s)
        s.setsockopt(zmq.LINGER, self._linger_ms)
        limit_inbound(s, SMALL_MESSAGE_BYTES)  # subscriptions, requests and acks are small
        if curve is not None:
            try:
                curve.apply(s)
            except zmq.ZMQError as exc:
                raise InputError(f"CURVE keys refused by ZeroMQ: {exc}") from None
        return s

    def _check_open(self) -> None:
        if self._closed:
            raise RuntimeError(f"{type(self).__name__} is closed")

    def _close_sockets(self) -> None:
        for s in self._sockets:
            s.close()
        self._sockets.clear()
        if self._own_context:
            self.context.term()

    @property
    def closed(self) -> bool:
        """True once :meth:`close` has run."""
        return self._closed

    def __enter__(self):
        return self

    def __exit__(self, *exc) -> None:
        self.close()


class MapPublisher(_Sockets):
    """Publishes load maps and heartbeats, answers snapshot requests, collects acks.

    Parameters
    ----------
    map_endpoint : str
        Where the PUB socket for ``map`` and ``heartbeat`` binds (``tcp://127.0.0.1:7341``).
        Port 0 picks a free port; the bound endpoint is in :attr:`map_endpoint`.
    snapshot_endpoint : str
        Where the ROUTER socket answering snapshot requests binds.
    ack_endpoint : str or None
        Where the PULL socket for acknowledgements binds; None for no acknowledgements.
    outcome_endpoint : str or None
        Where the PULL socket for frame outcomes (outer margin loop) binds; None for none.
    heartbeat_s : float
        Heartbeat interval in seconds (:meth:`tick`).
    map_hwm : int
        Send high-water mark of the map PUB, in messages per subscriber.
    linger_s : float
        How long unsent messages are kept at close, seconds.
    curve_secret_key : str or None
        The daemon's ``.key_secret`` file; turns CURVE on for all three sockets.
    curve_clients_dir : str or None
        Directory of authorised client ``.key`` files (needs ``curve_secret_key``); None admits
        any client that knows the server's public key.
    context : zmq.Context or None
        Context to create the sockets in; None makes (and at close terminates) a private one.
    epoch : str or None
        Epoch reported by heartbeats before the first map (the service's epoch id).

    Attributes
    ----------
    map_endpoint, snapshot_endpoint, ack_endpoint, outcome_endpoint : str or None
        Endpoints actually bound.
    snapshot_socket, ack_socket, outcome_socket : zmq.Socket or None
        For the service's ``zmq.Poller`` (POLLIN).
    current : LoadMap or None
        Last published (or primed) map; what a snapshot request gets.
    counters : collections.Counter
        ``maps``, ``heartbeats``, ``snapshots``, ``snapshots_empty``, ``bad_requests``,
        ``acks``, ``bad_acks`` (malformed or forged), ``send_dropped``.
    drops : DropCounter
        Malformed requests and acknowledgements by socket (``snapshots``, ``acks``) and
        reason; :attr:`protocol_errors` is its JSON-ready form.
    curve : CurveServer or None
        CURVE setup, for :class:`StatusPublisher` to share.
    """

    def __init__(self, *, map_endpoint: str = "tcp://127.0.0.1:7341",
                 snapshot_endpoint: str = "tcp://127.0.0.1:7342",
                 ack_endpoint: str | None = "tcp://127.0.0.1:7344",
                 outcome_endpoint: str | None = None,
                 heartbeat_s: float = 0.5, map_hwm: int = 1000, linger_s: float = 1.0,
                 curve_secret_key: str | Path | None = None,
                 curve_clients_dir: str | Path | None = None,
                 context: zmq.Context | None = None, epoch: str | None = None) -> None:
        check_publish_settings(dict(heartbeat_s=heartbeat_s, map_hwm=map_hwm, linger_s=linger_s,
                                    curve_secret_key=curve_secret_key,
                                    curve_clients_dir=curve_clients_dir), prefix="publish.")
        super().__init__(context, linger_s)
        self.heartbeat_s = float(heartbeat_s)
        self.epoch = epoch
        self.current: LoadMap | None = None
        self.counters: collections.Counter[str] = collections.Counter()
        self.drops = DropCounter(log)
        self._sent_seqs: list[list[int]] = []  # [first, last] runs of seqs sent in self.epoch
        self._next_heartbeat_s: float | None = None
        self.curve: CurveServer | None = None
        self.snapshot_socket: zmq.Socket | None = None
        self.ack_socket: zmq.Socket | None = None
        self.ack_endpoint: str | None = None
        self.outcome_socket: zmq.Socket | None = None
        self.outcome_endpoint: str | None = None
        try:
            if curve_secret_key is not None:
                self.curve = CurveServer(self.context, curve_secret_key, curve_clients_dir)
            self._pub = self._socket(zmq.PUB, self.curve)
            self._pub.setsockopt(zmq.SNDHWM, int(map_hwm))
            self.map_endpoint = bind_endpoint(self._pub, map_endpoint)
            self.snapshot_socket = self._socket(zmq.ROUTER, self.curve)
            self.snapshot_socket.setsockopt(zmq.RCVHWM, _RECEIVE_HWM)
            self.snapshot_endpoint = bind_endpoint(self.snapshot_socket, snapshot_endpoint)
            if ack_endpoint is not None:
                self.ack_socket = self._socket(zmq.PULL, self.curve)
                self.ack_socket.setsockopt(zmq.RCVHWM, _RECEIVE_HWM)
                self.ack_endpoint = bind_endpoint(self.ack_socket, ack_endpoint)
            if outcome_endpoint is not None:
                self.outcome_socket = self._socket(zmq.PULL, self.curve)
                self.outcome_socket.setsockopt(zmq.RCVHWM, 1000)
                limit_inbound(self.outcome_socket, _MAX_OUTCOME_BYTES)
                self.outcome_endpoint = bind_endpoint(self.outcome_socket, outcome_endpoint)
        except BaseException:
            self.close()
            raise

    # ------------------------------------------------------------------ maps and heartbeats

    def _send(self, socket: zmq.Socket, frames: list) -> bool:
        try:
            socket.send_multipart(frames, flags=zmq.NOBLOCK, copy=False)
            return True
        except zmq.Again:
            self.counters["send_dropped"] += 1
            return False

    def _check_order(self, load_map: LoadMap) -> None:
        last = self.current
        if last is not None and load_map.epoch == last.epoch and load_map.seq <= last.seq:
            raise ValueError(f"map seq={load_map.seq} is not greater than the last published "
                             f"seq={last.seq} (epoch {last.epoch})")

    def publish(self, load_map: LoadMap) -> list:
        """Send ``load_map`` on topic ``map`` and make it the snapshot answer.

        Returns the encoded frames (the service may record exactly these bytes).

        Raises
        ------
        ValueError
            When ``load_map.seq`` is not strictly greater than the last map's of the same
            epoch (a map of a new epoch starts a new order).
        RuntimeError
            After :meth:`close`.
        """
        self._check_open()
        self._check_order(load_map)
        frames = codec.encode(codec.TOPIC_MAP, load_map)
        self._note_sent(load_map.epoch, load_map.seq, load_map.seq)
        self.current = load_map
        self.epoch = load_map.epoch
        self._send(self._pub, frames)
        self.counters["maps"] += 1
        return frames

    def prime(self, load_map: LoadMap) -> None:
        """Adopt ``load_map`` (e.g. restored from saved state) for snapshots and heartbeats
        without sending it on ``map``. Same order rule as :meth:`publish`."""
        self._check_open()
        self._check_order(load_map)
        # A primed map was sent by an earlier run of this epoch, with (perhaps) the ones
        # before it: followers may still acknowledge any of them.
        self._note_sent(load_map.epoch, 0, load_map.seq)
        self.current = load_map
        self.epoch = load_map.epoch

    def _note_sent(self, epoch: str, first: int, last: int) -> None:
        if epoch != self.epoch:
            self._sent_seqs = []
        runs = self._sent_seqs
        if runs and runs[-1][1] + 1 >= first:
            runs[-1][1] = max(runs[-1][1], last)
        else:
            runs.append([first, last])

    def was_sent(self, epoch: Any, seq: Any) -> bool:
        """True when map ``seq`` of ``epoch`` was published (or primed) by this publisher."""
        if epoch != self.epoch or not isinstance(seq, int) or isinstance(seq, bool):
            return False
        return any(lo <= seq <= hi for lo, hi in self._sent_seqs)

    @property
    def protocol_errors(self) -> dict[str, dict[str, int]]:
        """Dropped requests and acknowledgements: ``{socket: {reason: n}}``."""
        return self.drops.counts()

    def heartbeat(self, now_s: float) -> None:
        """Send a heartbeat now: ``{"epoch", "seq", "time_s", "interval_s"}`` on ``heartbeat``.

        ``seq`` is the current map's (-1 before any), ``time_s`` is ``now_s``.
        """
        self._check_open()
        body = {"epoch": self.epoch if self.epoch is not None else "",
                "seq": self.current.seq if self.current is not None else -1,
                "time_s": float(now_s), "interval_s": self.heartbeat_s}
        self._send(self._pub, codec.encode(codec.TOPIC_HEARTBEAT, body))
        self.counters["heartbeats"] += 1
        self._next_heartbeat_s = float(now_s) + self.heartbeat_s

    def tick(self, now_s: float) -> float:
        """Send a heartbeat if one is due; return seconds until the next is due (for a poll
        timeout)."""
        if self._next_heartbeat_s is None or now_s >= self._next_heartbeat_s:
            self.heartbeat(now_s)
        return max(0.0, self._next_heartbeat_s - now_s)

    # ------------------------------------------------------------------ snapshots and acks

    def handle_snapshot(self) -> int:
        """Answer every waiting snapshot request without blocking; return how many.

        A request is ``[b"", b"snapshot"]`` from a REQ or DEALER (the empty delimiter is
        optional for DEALER). The reply repeats the envelope, then carries the current map
        encoded on topic ``snapshot``, or, before any map, a dict ``{"epoch", "seq": -1}``. A
        request of anything else gets ``{"error": ...}`` on topic ``snapshot``.
        """
        self._check_open()
        handled = 0
        while handled < _MAX_PER_CALL:
            try:
                msg = self.snapshot_socket.recv_multipart(flags=zmq.NOBLOCK)
            except zmq.Again:
                break
            handled += 1
            if b"" in msg[1:]:
                cut = msg.index(b"", 1) + 1
            else:
                cut = 1
            envelope, body = msg[:cut], msg[cut:]
            if body == [codec.SNAPSHOT_REQUEST]:
                if self.current is not None:
                    reply = codec.encode(codec.TOPIC_SNAPSHOT, self.current)
                    self.counters["snapshots"] += 1
                else:
                    reply = codec.encode(codec.TOPIC_SNAPSHOT,
                                         {"epoch": self.epoch or "", "seq": -1})
                    self.counters["snapshots_empty"] += 1
            else:
                self.counters["bad_requests"] += 1
                self.drops.drop("snapshots", "request",
                                f"a request of {len(body)} frames that is not b'snapshot'")
                reply = codec.encode(codec.TOPIC_SNAPSHOT,
                                     {"error": "request must be the single frame b'snapshot'"})
            self._send(self.snapshot_socket, envelope + reply)
        return handled

    def poll_acks(self) -> list[dict]:
        """Acknowledgements waiting on the ack socket, without blocking.

        Each is a dict with at least ``epoch`` (str), ``seq``, ``frame`` (int) and ``time_s``
        (float); malformed ones are dropped and counted as ``bad_acks`` and in
        :attr:`protocol_errors` (socket ``acks``, by reason). One for a map this publisher
        never sent (another epoch, a seq not published) is counted there as ``forged``.
        """
        self._check_open()
        return self._drain(self.ack_socket, "acks", "an ack", {"dict"}, codec.TOPIC_ACK,
                           self._check_ack)

    def _check_ack(self, body: dict) -> None:
        if not (_is_int(body.get("seq")) and _is_int(body.get("frame"))
                and isinstance(body.get("time_s"), (int, float))
                and not isinstance(body.get("time_s"), bool)):
            raise ProtocolError("ack needs integer seq and frame and a time_s",
                                reason="ack_fields")
        if not self.was_sent(body.get("epoch"), body["seq"]):
            raise ProtocolError(f"ack for seq {str(body['seq'])[:24]} of epoch "
                                f"{str(body.get('epoch'))[:24]!r}, which this daemon "
                                f"never sent", reason="forged")

    def poll_outcomes(self) -> list[FrameOutcome]:
        """Frame outcomes waiting on the outcome socket, without blocking.

        Malformed messages (any :class:`~brimline.daemon.errors.ProtocolError` of the codec, a
        topic other than ``outcome``, a record other than a frame outcome) are dropped and
        counted as ``bad_outcomes`` and in :attr:`protocol_errors` (socket ``outcomes``, by
        reason); good ones as ``outcomes``.
        """
        self._check_open()
        return self._drain(self.outcome_socket, "outcomes", "a frame outcome",
                           {"frame_outcome"}, codec.TOPIC_OUTCOME)

    def _drain(self, sock, name: str, what: str, types: set, topic: str,
               check: Callable[[Any], None] | None = None) -> list:
        """Read what waits on ``sock`` without blocking: at most ``_MAX_PER_CALL`` messages,
        good or bad (bounded under a flood). A message that does not decode as one of
        ``types`` on ``topic``, or that ``check`` refuses (a ``ProtocolError``), is dropped
        and counted as ``bad_<name>`` and in :attr:`protocol_errors` (socket ``name``, by
        reason); good ones are counted as ``name`` and returned."""
        if sock is None:
            return []
        good = []
        for _ in range(_MAX_PER_CALL):
            try:
                frames = sock.recv_multipart(flags=zmq.NOBLOCK, copy=False)
            except zmq.Again:
                break
            try:
                got, body = codec.decode(frames, types=types)
                if got != topic:
                    raise ProtocolError(f"not {what}: topic {got[:20]!r}", reason="topic")
                if check is not None:
                    check(body)
            except ProtocolError as exc:
                self.counters[f"bad_{name}"] += 1
                self.drops.drop(name, exc.reason, str(exc))
                continue
            self.counters[name] += 1
            good.append(body)
        return good

    def close(self) -> None:
        """Close the sockets (LINGER as configured), stop CURVE, end a private context.
        Idempotent."""
        if self._closed:
            return
        self._closed = True
        self._close_sockets()
        if self.curve is not None:
            self.curve.close()


class StatusPublisher(_Sockets):
    """The operators' status stream: a PUB with a small send queue that never blocks.

    Parameters
    ----------
    endpoint : str
        Where the PUB binds (``tcp://127.0.0.1:7343``); port 0 picks a free port.
    rate_hz : float
        Periodic status rate; :meth:`due` says when the next periodic status is due.
    hwm : int
        Send high-water mark in messages per subscriber. A subscriber that stops reading loses
        status messages beyond this (and whatever the kernel buffers hold); nobody waits.
    linger_s : float
        How long unsent messages are kept at close, seconds.
    curve : CurveServer or None
        Share the map publisher's CURVE setup (``MapPublisher.curve``); the socket is then made
        in that setup's context (client authorisation works per context).
    context : zmq.Context or None
        Context for the socket; None uses the curve's context or makes a private one.

    Notes
    -----
    ZeroMQ's PUB drops per subscriber when that subscriber's queue is full, silently. So that
    operators can still see loss, every dict published carries ``status_seq`` (counting from 0);
    a watcher that sees a jump knows how many it missed. ``counters["dropped"]`` counts the
    sends that ZeroMQ refused outright.
    """

    def __init__(self, *, endpoint: str = "tcp://127.0.0.1:7343", rate_hz: float = 4.0,
                 hwm: int = 10, linger_s: float = 0.0, curve: CurveServer | None = None,
                 context: zmq.Context | None = None) -> None:
        check_values(dict(rate_hz=rate_hz, hwm=hwm), STATUS_LIMITS, prefix="status.")
        if curve is not None and context is not None and curve.context is not context:
            raise ValueError("curve belongs to another zmq.Context; client authorisation only "
                             "covers sockets of the context it was made for")
        super().__init__(curve.context if curve is not None and context is None else context,
                         linger_s)
        self.rate_hz = float(rate_hz)
        self.counters: collections.Counter[str] = collections.Counter()
        self._status_seq = 0
        self._next_due_s: float | None = None
        try:
            self._pub = self._socket(zmq.PUB, curve)
            self._pub.setsockopt(zmq.SNDHWM, int(hwm))
            self.endpoint = bind_endpoint(self._pub, endpoint)
        except BaseException:
            self.close()
            raise

    def due(self, now_s: float) -> bool:
        """True (and the next period starts) when a periodic status is due at ``now_s``."""
        if self._next_due_s is None or now_s >= self._next_due_s:
            period = 1.0 / self.rate_hz
            nxt = (self._next_due_s or now_s) + period
            self._next_due_s = nxt if nxt > now_s else now_s + period  # no catch-up bursts
            return True
        return False

    def publish(self, record: Any, topic: str = codec.TOPIC_STATUS) -> bool:
        """Send ``record`` (a dict or any codec record) on ``topic`` without blocking.

        A dict gets ``status_seq`` added. Returns False when ZeroMQ refused the message
        (counted as ``dropped``).
        """
        self._check_open()
        if isinstance(record, dict):
            record = {**record, "status_seq": self._status_seq}
            self._status_seq += 1
        frames = codec.encode(topic, record)
        try:
            self._pub.send_multipart(frames, flags=zmq.NOBLOCK, copy=False)
        except zmq.Again:
            self.counters["dropped"] += 1
            return False
        self.counters["sent"] += 1
        return True

    def close(self) -> None:
        """Close the socket and a private context. Idempotent."""
        if self._closed:
            return
        self._closed = True
        self._close_sockets()
