"""Per-tone estimates pushed by the user's own receiver over ZeroMQ: :class:`PushedDriver`.

A receiver that already estimates the channel sends one message per frame, in the codec's
layout (:mod:`brimline.daemon.wire.codec`: topic ``estimate``, the JSON header, then the raw
little-endian arrays ``tone_index`` ``<i2``, ``channel`` ``<c8``, ``noise_var`` ``<f4``,
``snr_db`` ``<f4``; fields ``frame``, ``time_s``, ``plan_id``, ``map_seq_seen``, ...). A
receiver that measures SNR only sends ``channel = 10**(snr_db/20)`` and ``noise_var = 1``.
``plan_id`` may be ``""`` (not stated) or the daemon's; ``tone_index`` must be the plan's data
tones in order; ``time_s`` must increase (the sender's clock; the daemon's decisions run on its
own monotonic clock). The README has a sender of a few lines in plain pyzmq.

Every message is checked before it reaches the estimator; a bad one is dropped and counted
under its reason in ``counters``, with at most one warning per ``warn_every_s``:

``oversize``       the parts together exceed ``max_message_bytes`` (a single larger part
                   never arrives: ZeroMQ's ``MAXMSGSIZE`` drops that sender's connection)
``wrong_topic``    the first part is not ``estimate``
``wrong_dtype``    an array has another dtype than the layout's
``wrong_shape``    an array is not one-dimensional with one entry per tone of ``tone_index``
``malformed``      anything else the codec refuses (header, version, checksum, fields)
``wrong_type``     a record other than an estimate
``wrong_plan``     another ``plan_id``, or other tones than the plan's data tones
``non_finite``     NaN or infinity in ``time_s``, ``snr_db``, ``channel`` or ``noise_var``,
                   or a ``noise_var`` that is not positive
``flood_dropped``  more messages waiting than ``queue_messages``: the oldest are dropped

Messages are taken off the socket as fast as they come (into a queue of ``queue_messages``)
and decoded only when the daemon takes the next estimate, so a flood costs a receive and a
counter per message.
"""

from __future__ import annotations

import collections
import json
import logging
import math
import time
from typing import Callable, Iterator

import numpy as np
import zmq

from brimline.daemon.errors import ConfigError, ProtocolError
from brimline.daemon.limits import POSITIVE, between, check_values
from brimline.daemon.records import Estimate, TonePlan
from brimline.daemon.wire import codec
from brimline.drivers.sources._inlet import Inlet, RejectLog, check_endpoint
from brimline.drivers.sources.base import Driver

__all__ = ["PushedDriver", "PUSHED_LIMITS", "ESTIMATE_ARRAYS", "check_endpoint"]

log = logging.getLogger("brimline.sources.pushed")

#: Limits of ``driver.pushed.*``, checked by the constructor and the config.
PUSHED_LIMITS = {
    "max_message_bytes": between(1024, 1 << 30),
    "queue_messages": between(1, 1 << 20),
    "warn_every_s": POSITIVE,
}

#: Arrays of a pushed estimate and their dtypes (the codec's ``estimate`` record).
ESTIMATE_ARRAYS = {"tone_index": "<i2", "channel": "<c8", "noise_var": "<f4", "snr_db": "<f4"}

_TOPIC = codec.TOPIC_ESTIMATE.encode("ascii")
_DRAIN_MAX = 10_000  # messages taken off the socket per pass, at most


class PushedDriver(Driver):
    """Estimates pushed over ZeroMQ by an external receiver.

    Parameters
    ----------
    plan : TonePlan
        The daemon's tone plan; pushed estimates must carry its data tones.
    endpoint : str
        ZeroMQ endpoint to bind (or connect to, when ``bind`` is false).
    bind : bool
        Bind the endpoint (senders connect) or connect to it (the sender binds).
    pattern : {"pull", "sub"}
        PULL (senders PUSH) or SUB to topic ``estimate`` (senders PUB).
    max_message_bytes : int
        Largest message accepted, bytes (also the socket's ``MAXMSGSIZE``).
    queue_messages : int
        Messages waiting at most; beyond, the oldest are dropped and counted.
    warn_every_s : float
        Least time between two warnings about rejected messages, s.
    context : zmq.Context, optional
        Context of the socket (tests); by default the driver makes its own.
    clock : callable
        Monotonic clock of the warnings' rate limit, s.

    Raises
    ------
    ConfigError
        A setting out of its limit.
    SourceError
        The endpoint cannot be bound or connected.
    """

    name = "pushed"

    def __init__(self, *, plan: TonePlan, endpoint: str = "tcp://127.0.0.1:7347",
                 bind: bool = True, pattern: str = "pull", max_message_bytes: int = 1 << 20,
                 queue_messages: int = 64, warn_every_s: float = 10.0,
                 context: zmq.Context | None = None,
                 clock: Callable[[], float] = time.monotonic) -> None:
        super().__init__()
        check_values(dict(max_message_bytes=max_message_bytes, queue_messages=queue_messages,
                          warn_every_s=warn_every_s), PUSHED_LIMITS, prefix="driver.pushed.",
                     error=ConfigError)
        check_endpoint("driver.pushed.endpoint", endpoint, ConfigError)
        if pattern not in ("pull", "sub"):
            raise ConfigError(f"driver.pushed.pattern={pattern!r} must be 'pull' or 'sub'")
        self.plan = plan
        self.max_message_bytes = int(max_message_bytes)
        self.queue_messages = int(queue_messages)
        self._tones = np.asarray(plan.data_tones, dtype=np.int16)
        self.rejects = RejectLog(self.counters, log, "driver.pushed", warn_every_s, clock)
        # RCVHWM above the driver's own queue: the driver, not ZeroMQ, decides what is dropped
        # (and counts it); a PUSH sender blocks only beyond both.
        self.inlet = Inlet("driver.pushed.endpoint", endpoint, bind=bind, pattern=pattern,
                           topic=_TOPIC, max_message_bytes=max_message_bytes,
                           queue_messages=max(4 * self.queue_messages, 1000), context=context)

    @property
    def endpoint(self) -> str:
        """The bound endpoint (port resolved) or the one connected to."""
        return self.inlet.endpoint

    def _frames(self) -> Iterator[Estimate]:
        if not self.inlet.take():
            return
        waiting: collections.deque[list[bytes]] = collections.deque()
        try:
            while not self.closed:
                msg = self.inlet.receive(0 if waiting else 100)
                taken = 0
                while msg is not None:
                    if len(waiting) >= self.queue_messages:
                        waiting.popleft()
                        self.rejects.reject("flood_dropped", f"more than {self.queue_messages} "
                                                             f"messages waiting")
                    waiting.append(msg)
                    taken += 1
                    msg = self.inlet.receive(0) if taken < _DRAIN_MAX else None
                if not waiting:
                    continue
                estimate = self.check(waiting.popleft())
                if estimate is not None:
                    self.counters["frames"] += 1
                    yield estimate
        finally:
            self.inlet.release()

    def check(self, parts: list[bytes]) -> Estimate | None:
        """One message as an estimate of the plan, or None (counted under its reason)."""
        size = sum(len(p) for p in parts)
        if size > self.max_message_bytes:
            self.rejects.reject("oversize", f"{size} bytes, more than "
                                            f"max_message_bytes={self.max_message_bytes}")
            return None
        if not parts or parts[0] != _TOPIC:
            topic = bytes(parts[0][:20]) if parts else b""
            self.rejects.reject("wrong_topic", f"topic {topic!r}, expected {_TOPIC!r}")
            return None
        reason = self._array_problem(parts)
        if reason is not None:
            self.rejects.reject(*reason)
            return None
        try:
            _topic, record = codec.decode(parts)
        except ProtocolError as exc:
            self.rejects.reject("malformed", str(exc))
            return None
        if not isinstance(record, Estimate):
            self.rejects.reject("wrong_type", f"a {type(record).__name__}, expected an estimate")
            return None
        if record.plan_id not in ("", self.plan.plan_id) or not np.array_equal(
                record.tone_index, self._tones):
            self.rejects.reject("wrong_plan", f"plan_id={record.plan_id!r} with "
                                              f"{record.n_tones} tones; the daemon's plan is "
                                              f"{self.plan.plan_id!r} with {self._tones.size} "
                                              f"data tones")
            return None
        if not (math.isfinite(record.time_s)
                and np.isfinite(record.snr_db).all() and np.isfinite(record.noise_var).all()
                and np.isfinite(record.channel.view(np.float32)).all()
                and (record.noise_var > 0).all()):
            self.rejects.reject("non_finite", f"frame {record.frame}: NaN, infinity or a "
                                              f"noise_var <= 0")
            return None
        if record.plan_id == "":
            record = Estimate(**{**{f: getattr(record, f) for f in record.__dataclass_fields__},
                                 "plan_id": self.plan.plan_id})
        return record

    def _array_problem(self, parts: list[bytes]) -> tuple[str, str] | None:
        """Dtype and shape of the declared arrays, judged before decoding (for the counts)."""
        try:
            header = json.loads(bytes(parts[1]).decode("utf-8")) if len(parts) > 1 else None
        except (UnicodeDecodeError, ValueError, RecursionError):
            return None  # the codec says why
        specs = header.get("arrays") if isinstance(header, dict) else None
        if not isinstance(specs, list):
            return None
        shapes = {}
        for spec in specs:
            if not isinstance(spec, dict) or not isinstance(spec.get("name"), str) \
                    or spec["name"] not in ESTIMATE_ARRAYS:
                continue
            name = spec["name"]
            if spec.get("dtype") != ESTIMATE_ARRAYS[name]:
                return ("wrong_dtype", f"{name} has dtype {spec.get('dtype')!r}, expected "
                                       f"{ESTIMATE_ARRAYS[name]!r}")
            shapes[name] = spec.get("shape")
        first = shapes.get("tone_index")
        for name, shape in shapes.items():
            if not (isinstance(shape, list) and len(shape) == 1) or shape != first:
                return ("wrong_shape", f"{name} has shape {shape!r}; every array must be "
                                       f"one-dimensional with one entry per tone of "
                                       f"tone_index ({first!r})")
        return None

    def _release(self) -> None:
        self.inlet.close()
