"""The emulated air: transmitted IQ carried over a loopback ZeroMQ socket, through the channel.

Two emulated radios (:mod:`brimline.drivers.devices.emulated`) in two processes meet here. The
transmitting side binds a PUB (:class:`AirSender`) and sends each buffer as it would leave the
antenna; the receiving side connects a SUB (:class:`AirReceiver`), passes what arrives through
the channel simulator (:class:`StreamChannel`, the frame-wise
:class:`~brimline.drivers.air.channel.LinkChannel` made continuous) and adds the receiver's
noise. Nothing arriving is silence: the receiver still hears noise.

Message layout (two frames): the first sample's index as a little-endian uint64, then the
samples as little-endian complex64 in transmitter full-scale units (1.0 = the DAC's full scale,
after its attenuation). A message of another shape is dropped and counted (``malformed``). The
receiver places messages by their index: a jump forward (the transmitter sent nothing for a
while, an underrun) becomes that much silence (counted ``gap_samples``); an index that goes
back (a transmitter started again) is taken as a new start.

Sockets use ``LINGER=0``; each object is a context manager and belongs to one thread.
"""

from __future__ import annotations

import collections
import math
import struct
import time

import numpy as np
import zmq

from brimline.daemon.records import TonePlan
from brimline.drivers.air.channel import LinkChannel

__all__ = ["AirSender", "AirReceiver", "StreamChannel", "AIR_HWM"]

#: Messages queued per peer before ZeroMQ drops (about a second of 50 buffers per second).
AIR_HWM = 64
_INDEX = struct.Struct("<Q")


class _AirEnd:
    """One end of the air: a socket on a given or private context; a context manager."""

    def _open(self, kind: int, context: zmq.Context | None) -> None:
        self._closed = False
        self._own = context is None
        self.context = zmq.Context() if context is None else context
        self._socket = self.context.socket(kind)
        self._socket.setsockopt(zmq.LINGER, 0)

    def close(self) -> None:
        """Close the socket (and a private context). Idempotent."""
        if self._closed:
            return
        self._closed = True
        self._socket.close(0)
        if self._own:
            self.context.term()

    def __enter__(self):
        return self

    def __exit__(self, *exc) -> None:
        self.close()


class AirSender(_AirEnd):
    """The transmitting end of the air: binds a PUB at ``endpoint``.

    Parameters
    ----------
    endpoint : str
        Where to bind (``tcp://127.0.0.1:7350``; port 0 picks a free one, see ``endpoint``).
    context : zmq.Context or None
        Context for the socket; None makes (and at close terminates) a private one.
    """

    def __init__(self, endpoint: str, *, context: zmq.Context | None = None) -> None:
        self._open(zmq.PUB, context)
        self._socket.setsockopt(zmq.SNDHWM, AIR_HWM)
        self.counters: collections.Counter[str] = collections.Counter()
        try:
            self._socket.bind(endpoint)
        except zmq.ZMQError as exc:
            self.close()
            raise OSError(f"air endpoint {endpoint}: cannot bind: {exc}") from exc
        self.endpoint = self._socket.getsockopt(zmq.LAST_ENDPOINT).decode()

    def send(self, first_index: int, samples: np.ndarray) -> None:
        """Put ``samples`` on the air; never blocks (a slow listener loses messages)."""
        if self._closed:
            raise RuntimeError("AirSender is closed")
        data = np.ascontiguousarray(samples, dtype="<c8")
        try:
            self._socket.send_multipart([_INDEX.pack(int(first_index)), data], flags=zmq.NOBLOCK,
                                        copy=False)
            self.counters["sent"] += 1
        except zmq.Again:
            self.counters["dropped"] += 1

class AirReceiver(_AirEnd):
    """The receiving end of the air: connects a SUB to ``endpoint``, queues what arrives.

    Parameters
    ----------
    endpoint : str
        The sender's endpoint.
    max_queued : int
        Samples kept waiting for :meth:`take`; older ones beyond it are dropped (counted as
        ``late_dropped``: the receiver fell behind the air).
    context : zmq.Context or None
        As for :class:`AirSender`.
    """

    def __init__(self, endpoint: str, *, max_queued: int = 1 << 20,
                 context: zmq.Context | None = None) -> None:
        self._open(zmq.SUB, context)
        self._socket.setsockopt(zmq.RCVHWM, AIR_HWM)
        self._socket.setsockopt(zmq.SUBSCRIBE, b"")
        try:
            self._socket.connect(endpoint)
        except zmq.ZMQError as exc:
            self.close()
            raise OSError(f"air endpoint {endpoint}: cannot connect: {exc}") from exc
        self.max_queued = int(max_queued)
        self._next: int | None = None  # index of the sample expected next from the sender
        #: Monotonic time of the last message taken in (None before the first).
        self.last_arrival_s: float | None = None
        self._queue: collections.deque[np.ndarray] = collections.deque()
        self._queued = 0
        self.counters: collections.Counter[str] = collections.Counter()

    def drain(self) -> int:
        """Move everything that has arrived into the queue; returns the samples queued."""
        if self._closed:
            raise RuntimeError("AirReceiver is closed")
        while True:
            try:
                frames = self._socket.recv_multipart(flags=zmq.NOBLOCK)
            except zmq.Again:
                break
            if len(frames) != 2 or len(frames[0]) != _INDEX.size or len(frames[1]) % 8:
                self.counters["malformed"] += 1
                continue
            samples = np.frombuffer(frames[1], dtype="<c8")
            if not np.isfinite(samples).all():
                self.counters["malformed"] += 1
                continue
            first = _INDEX.unpack(frames[0])[0]
            gap = 0 if self._next is None else first - self._next
            if 0 < gap <= self.max_queued:
                # the transmitter sent nothing for a while (an underrun): silence on the air
                self._queue.append(np.zeros(gap, np.complex64))
                self._queued += gap
                self.counters["gap_samples"] += gap
            self._next = first + samples.size  # (a restarted transmitter counts from 0 again)
            self._queue.append(samples)
            self._queued += samples.size
            self.counters["received"] += 1
            self.last_arrival_s = time.monotonic()
        while self._queued > self.max_queued and self._queue:
            self._queued -= self._queue.popleft().size
            self.counters["late_dropped"] += 1
        return self._queued

    def take(self, n: int) -> np.ndarray:
        """``n`` samples off the queue, silence (zeros) where nothing arrived."""
        out = np.zeros(int(n), np.complex64)
        filled = 0
        while filled < n and self._queue:
            head = self._queue[0]
            k = min(n - filled, head.size)
            out[filled:filled + k] = head[:k]
            filled += k
            if k == head.size:
                self._queue.popleft()
            else:
                self._queue[0] = head[k:]
            self._queued -= k
        if filled < n:
            self.counters["silent_samples"] += n - filled
        return out

    def discard(self, n: int) -> None:
        """Drop ``n`` queued samples (what a receive overflow loses)."""
        self.take(n)

class StreamChannel:
    """The channel simulator applied to a continuous stream, chunk by chunk.

    :class:`LinkChannel` passes one frame at a time and returns it with its filter tail; here
    each chunk's tail is added to the start of the next, and the channel's time runs on with
    the sample count, so fading, frequency offset and delay are continuous across chunks.

    Parameters
    ----------
    plan : TonePlan
        Tone plan (sample rate and FFT size).
    snr_db : float
        SNR of a unit-power tone, dB (receiver noise).
    profile, doppler_hz, cfo_hz : see :class:`LinkChannel`.
    rng : numpy.random.Generator
        Source of fading and noise.
    """

    def __init__(self, plan: TonePlan, *, snr_db: float, profile: str = "awgn",
                 doppler_hz: float = 0.0, cfo_hz: float = 0.0,
                 rng: np.random.Generator) -> None:
        # The channel without noise (its SNR infinite); noise is added once per sample here.
        self.channel = LinkChannel(plan, profile=profile, doppler_hz=doppler_hz,
                                   snr_db=math.inf, cfo_hz=cfo_hz, rng=rng)
        self.sigma = math.sqrt(10.0 ** (-snr_db / 10.0) / 2.0)
        self.rng = rng
        self.fs = plan.sample_rate_hz
        self.index = 0
        self._tail = np.zeros(0, np.complex128)

    def __call__(self, samples: np.ndarray) -> np.ndarray:
        """The received stream for the next ``samples`` sent (same length, complex128).

        Only the span between the first and last non-zero sample goes through the channel
        (the gaps between frames cost nothing); silence still gets the receiver's noise.
        """
        n = samples.size
        if n == 0:
            return np.zeros(0, np.complex128)
        active = np.flatnonzero(samples)
        y = np.zeros(max(n, self._tail.size), np.complex128)
        if active.size:
            first, last = int(active[0]), int(active[-1]) + 1
            part = self.channel.transmit(samples[first:last], (self.index + first) / self.fs)
            if first + part.size > y.size:
                y = np.concatenate([y, np.zeros(first + part.size - y.size, np.complex128)])
            y[first:first + part.size] += part
        y[:self._tail.size] += self._tail
        out, self._tail = y[:n], y[n:]
        self.index += n
        noise = self.rng.standard_normal(2 * n, dtype=np.float32).view(np.complex64)
        return out + self.sigma * noise
