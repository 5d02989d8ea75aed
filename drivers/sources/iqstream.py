"""Raw IQ over ZeroMQ through the receiver DSP: :class:`IqStreamDriver`.

For an SDR framework whose ZeroMQ sink (PUB or PUSH) sends the raw bytes of its sample stream,
one message per block: ``cf32`` (complex float32, little-endian I/Q pairs, full scale 1.0) or
``ci16`` (complex int16, full scale 32768 as in SigMF, :data:`~brimline.drivers.sources.iq.
CI16_FULL_SCALE`). The stream's sample rate must be ``link.sample_rate_hz``; nothing on the
wire says so, so check the sender. The samples go through the same :class:`FrameScanner` as a
recording (:class:`~brimline.drivers.sources.iq.IqDriver`): the same IQ gives the same
estimates. ``time_s`` is ``start_s`` plus the sample position of the frame.

A stream can lose messages (a PUB drops what a slow subscriber cannot take), so consecutive
messages are not assumed contiguous: :class:`~brimline.drivers.link.continuity.Continuity`
counts ``lost_frames`` and ``suspected_overflows`` from the header counters and marks frames
spliced across lost samples invalid. Messages that cannot be samples are dropped, counted, and
warned about at most once per ``warn_every_s``: ``oversize`` (over ``max_message_bytes``),
``multipart`` (more than one part, e.g. a tag header), ``bad_length`` (not a whole number of
samples), ``non_finite`` (NaN or infinity in cf32). ci16 samples at full scale flag their frame
"clipped" (``valid=False``), as for recordings.
"""

from __future__ import annotations

import dataclasses
import logging
import time
from typing import Callable, Iterator

import numpy as np
import zmq

from brimline.daemon.errors import ConfigError
from brimline.daemon.limits import FINITE, POSITIVE, at_least, between, check_values
from brimline.daemon.records import Estimate, TonePlan
from brimline.drivers.link.continuity import Continuity
from brimline.drivers.link.frame import as_link_plan
from brimline.drivers.link.receiver import FrameScanner, Receiver
from brimline.drivers.sources._inlet import Inlet, RejectLog, check_endpoint
from brimline.drivers.sources.base import Driver
from brimline.drivers.sources.iq import CI16_FULL_SCALE

__all__ = ["IqStreamDriver", "IQ_STREAM_LIMITS", "SAMPLE_FORMATS"]

log = logging.getLogger("brimline.sources.iq_stream")

#: Bytes per complex sample of each format.
SAMPLE_FORMATS = {"cf32": 8, "ci16": 4}

#: Limits of ``driver.iq_stream.*``, checked by the constructor and the config.
IQ_STREAM_LIMITS = {
    "default_bits": at_least(0),
    "sync_threshold": between(0.0, 1.0, low_open=True, high_open=True),
    "max_message_bytes": between(1024, 1 << 30),
    "queue_messages": between(1, 1 << 20),
    "warn_every_s": POSITIVE,
    "start_s": FINITE,
}


class IqStreamDriver(Driver):
    """Estimates from raw IQ samples received over ZeroMQ (see the module docstring).

    Parameters
    ----------
    plan : TonePlan
        Tone plan and frame layout.
    endpoint : str
        ZeroMQ endpoint to connect to (or bind, when ``bind`` is true).
    bind : bool
        Bind the endpoint instead of connecting (the sender connects).
    pattern : {"sub", "pull"}
        SUB to everything (the sender PUBs) or PULL (the sender PUSHes).
    sample_format : {"cf32", "ci16"}
        Sample encoding of the messages.
    default_bits : int
        Bits per tone of the transmitter's default map.
    sync_threshold : float
        Receiver frame detection threshold.
    max_message_bytes : int
        Largest message accepted, bytes (also the socket's ``MAXMSGSIZE``).
    queue_messages : int
        Receive queue of the socket (``RCVHWM``), messages.
    warn_every_s : float
        Least time between two warnings about dropped messages, s.
    start_s : float
        ``time_s`` of the stream's first sample, s.
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

    name = "iq_stream"

    def __init__(self, *, plan: TonePlan, endpoint: str = "tcp://127.0.0.1:7348",
                 bind: bool = False, pattern: str = "sub", sample_format: str = "cf32",
                 default_bits: int = 2, sync_threshold: float = 0.3,
                 max_message_bytes: int = 16 << 20, queue_messages: int = 256,
                 warn_every_s: float = 10.0, start_s: float = 0.0,
                 context: zmq.Context | None = None,
                 clock: Callable[[], float] = time.monotonic) -> None:
        super().__init__()
        check_values(dict(default_bits=default_bits, sync_threshold=sync_threshold,
                          max_message_bytes=max_message_bytes, queue_messages=queue_messages,
                          warn_every_s=warn_every_s, start_s=start_s), IQ_STREAM_LIMITS,
                     prefix="driver.iq_stream.", error=ConfigError)
        check_endpoint("driver.iq_stream.endpoint", endpoint, ConfigError)
        if pattern not in ("pull", "sub"):
            raise ConfigError(f"driver.iq_stream.pattern={pattern!r} must be 'sub' or 'pull'")
        if sample_format not in SAMPLE_FORMATS:
            raise ConfigError(f"driver.iq_stream.sample_format={sample_format!r} must be one "
                              f"of {sorted(SAMPLE_FORMATS)}")
        self.plan = as_link_plan(plan)
        if not default_bits <= self.plan.max_bits:
            raise ConfigError(f"driver.iq_stream.default_bits={default_bits} must be in "
                              f"[0, link.max_bits={self.plan.max_bits}]")
        self.sample_format = sample_format
        self.max_message_bytes = int(max_message_bytes)
        self.start_s = float(start_s)
        clip = ((32767 - 0.5) / CI16_FULL_SCALE if sample_format == "ci16" else None)
        self.receiver = Receiver(self.plan, default_bits=default_bits,
                                 sync_threshold=sync_threshold, clip_level=clip)
        self.rejects = RejectLog(self.counters, log, "driver.iq_stream", warn_every_s, clock)
        self.inlet = Inlet("driver.iq_stream.endpoint", endpoint, bind=bind, pattern=pattern,
                           topic=b"", max_message_bytes=max_message_bytes,
                           queue_messages=queue_messages, context=context)

    @property
    def endpoint(self) -> str:
        """The bound endpoint (port resolved) or the one connected to."""
        return self.inlet.endpoint

    def samples(self, parts: list[bytes]) -> np.ndarray | None:
        """One message as complex64 samples, or None (counted under its reason)."""
        if len(parts) != 1:
            self.rejects.reject("multipart", f"{len(parts)} parts; one part of raw samples "
                                             f"expected (no tag header)")
            return None
        blob = parts[0]
        if len(blob) > self.max_message_bytes:
            self.rejects.reject("oversize", f"{len(blob)} bytes")
            return None
        width = SAMPLE_FORMATS[self.sample_format]
        if len(blob) % width or not blob:
            self.rejects.reject("bad_length", f"{len(blob)} bytes is not a whole number of "
                                              f"{self.sample_format} samples ({width} bytes)")
            return None
        if self.sample_format == "cf32":
            x = np.frombuffer(blob, dtype="<c8").astype(np.complex64)
            if not np.isfinite(x.view(np.float32)).all():
                self.rejects.reject("non_finite", "NaN or infinity in cf32 samples")
                return None
            return x
        pairs = np.frombuffer(blob, dtype="<i2").astype(np.float32) / np.float32(CI16_FULL_SCALE)
        return (pairs[0::2] + 1j * pairs[1::2]).astype(np.complex64)

    def _frames(self) -> Iterator[Estimate]:
        if not self.inlet.take():
            return
        plan = self.plan
        scanner, continuity, fed, count = FrameScanner(self.receiver), Continuity(), 0, 0
        try:
            while not self.closed:
                msg = self.inlet.receive(100)
                if msg is None:
                    continue
                x = self.samples(msg)
                if x is None:
                    continue
                self.counters["messages"] += 1
                continuity.boundary(fed)
                fed += x.size
                before = dict(continuity.counters)
                for start, res in scanner.feed(x):
                    if res.reason:
                        self.counters[res.reason] += 1
                    if not res.has_estimate:
                        continue
                    end = start - res.start + res.end
                    for (frame_res, frame_start), ok in continuity.frame(
                            (res, start), start=start - plan.cp_len, end=end,
                            header_ok=res.header_ok, counter=res.counter):
                        est = frame_res.to_estimate(
                            plan=plan, frame=count,
                            time_s=self.start_s + frame_start / plan.sample_rate_hz)
                        if not ok:
                            est = dataclasses.replace(est, valid=False)
                        count += 1
                        self.counters["frames"] += 1
                        yield est
                for key, value in continuity.counters.items():
                    if value != before.get(key, 0):
                        self.counters[key] += value - before.get(key, 0)
        finally:
            self.inlet.release()

    def _release(self) -> None:
        self.inlet.close()
