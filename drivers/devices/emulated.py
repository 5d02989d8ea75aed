"""An emulated radio: a stand-in for a pyadi-iio transceiver whose air is the channel simulator.

:class:`EmulatedRadio` has the attributes and calls brimline's radio code uses on a pyadi-iio
device object (``sample_rate``, ``rx_lo``/``tx_lo``, ``rx_rf_bandwidth``/``tx_rf_bandwidth``,
``gain_control_mode_chan0``, ``rx_hardwaregain_chan0``, ``tx_hardwaregain_chan0``,
``rx_buffer_size``, ``tx_cyclic_buffer``, ``rx()``, ``tx()``, ``rx_destroy_buffer()``,
``tx_destroy_buffer()``) with pyadi-iio's buffer semantics:

* the receive buffer is made at the first ``rx()`` with the ``rx_buffer_size`` then in force;
  changing ``rx_buffer_size`` afterwards has no effect until ``rx_destroy_buffer()``;
* with ``tx_cyclic_buffer`` the first ``tx(data)`` makes a buffer that repeats until
  ``tx_destroy_buffer()``; a second ``tx()`` before that is refused; without it each ``tx()``
  queues one buffer (same length every time) and blocks while the queue is full, as the
  kernel's buffers do;
* ``tx()`` takes complex samples scaled to the DAC's 16-bit words (full scale 2**14, the
  common pyadi-iio convention for the AD936x family); ``rx()`` returns complex samples in ADC
  units of the 12-bit converter (-2048..2047), rounded and clipped as the converter would.

Transmit and receive run at real-time pace on the monotonic clock: a sender thread puts one
buffer on the air (:mod:`brimline.drivers.air.loopback`) every buffer period, and ``rx()``
returns when the air has had time to carry a buffer's worth of samples and, while a transmitter
is on the air, once its samples have arrived (they come in bursts of a transmit buffer; a
receiver that read ahead would put silence into the middle of the stream). Two processes, each
with an EmulatedRadio on the same ``air_endpoint``, talk exactly as two radios would; the
transmitting one binds the endpoint.

Levels: the air carries ``data / 2**14`` attenuated by ``tx_hardwaregain_chan0``; the receiver
adds ``path_gain_db``, passes the stream through the channel (noise at ``snr_db`` below a
unit-power tone) and scales it so that a unit-power tone at ``rx_hardwaregain_chan0 = 30`` dB
is 256 ADC units RMS (every 1 dB of gain is 1 dB more).

Fault knobs (all off by default): ``overflow_every`` (every N-th receive buffer half a buffer
of samples is lost before it, counted ``overflows``), ``rx_timeout_every`` (every N-th
``rx()`` raises :class:`TimeoutError`), ``vanish_after_s``/``vanish_for_s`` (from that long
after the first device of this process was opened, every call and every new device raises
``OSError(ENODEV)`` for that long), ``clock_ppm`` (the receiver's sample clock is off by that
many parts per million), ``tx_underrun_every`` (every N-th transmit buffer period the host
"misses" and the air is silent for it, counted ``underruns``).
"""

from __future__ import annotations

import collections
import errno
import math
import queue
import threading
import time
from types import MappingProxyType

import numpy as np

from brimline.daemon.limits import FINITE, NON_NEGATIVE, at_least, between, check_values
from brimline.drivers.air.loopback import AirReceiver, AirSender, StreamChannel
from brimline.drivers.link.frame import make_plan

__all__ = ["EmulatedRadio", "EMULATED_LIMITS", "TX_FULL_SCALE", "ADC_MAX", "MAX_ATTENUATION_DB",
           "vanish_reference_s"]

#: Limits of :class:`EmulatedRadio`'s numeric keyword arguments (the ``emulated:`` section).
EMULATED_LIMITS = MappingProxyType({
    "snr_db": between(-50.0, 100.0),
    "doppler_hz": between(0.0, 1000.0),
    "cfo_hz": FINITE,
    "path_gain_db": between(-100.0, 100.0),
    "overflow_every": at_least(0),
    "rx_timeout_every": at_least(0),
    "tx_underrun_every": at_least(0),
    "vanish_after_s": NON_NEGATIVE,
    "vanish_for_s": NON_NEGATIVE,
    "clock_ppm": between(-1000.0, 1000.0),
})

#: DAC words per unit of full scale (pyadi-iio convention for the AD936x family).
TX_FULL_SCALE = 2.0 ** 14
#: Largest ADC value of the 12-bit converter.
ADC_MAX = 2047
#: Largest transmit attenuation of the AD9361 family, dB (its data sheet's range).
MAX_ATTENUATION_DB = 89.75
_UNIT_TONE_ADC = 256.0  # ADC units RMS of a unit-power tone at the reference gain
_REFERENCE_GAIN_DB = 30.0
_TX_QUEUE = 4  # transmit buffers the "kernel" holds (pyadi-iio's default is four)
_AIR_WAIT_S = 0.25  # longest wait of rx() for a transmitter's samples that are due
_AIR_QUIET_S = 0.25  # nothing heard for this long: no transmitter, the air is silence
_PROCESS_OPENED_S: list[float] = []  # monotonic time the first device of this process opened


def vanish_reference_s() -> float:
    """Monotonic time, s, that ``vanish_after_s`` counts from: the first emulated device opened
    in this process (now, when none was yet). Tests that run many devices in one process place
    a vanishing window with it."""
    if not _PROCESS_OPENED_S:
        _PROCESS_OPENED_S.append(time.monotonic())
    return _PROCESS_OPENED_S[0]


def _vanished(after_s: float | None, for_s: float) -> bool:
    if after_s is None or not _PROCESS_OPENED_S:
        return False
    elapsed = time.monotonic() - _PROCESS_OPENED_S[0]
    return after_s <= elapsed < after_s + for_s


class EmulatedRadio:
    """A pyadi-iio-like transceiver on the emulated air.

    Parameters
    ----------
    uri : str
        Kept for messages only (as pyadi-iio's ``uri``).
    air_endpoint : str
        The loopback air socket; the transmitting device binds it, the receiving one connects.
    snr_db, profile, doppler_hz, cfo_hz : float, str
        The channel (see :class:`~brimline.drivers.air.loopback.StreamChannel`).
    path_gain_db : float
        Gain from transmitter output to receiver input, dB.
    seed : int
        Seed of the channel's random generator.
    overflow_every, rx_timeout_every, tx_underrun_every : int
        Fault every N-th buffer (0: never).
    vanish_after_s, vanish_for_s : float or None, float
        The device is gone for ``vanish_for_s`` from ``vanish_after_s`` after the first open.
    clock_ppm : float
        Receiver sample clock error, parts per million.

    Attributes
    ----------
    counters : collections.Counter
        ``rx_buffers``, ``overflows``, ``rx_timeouts``, ``tx_buffers``, ``underruns``, ...
    history : list of tuple
        Every transmit-side call in order: ``("tx", n)``, ``("tx_destroy_buffer",)``,
        ``("tx_hardwaregain_chan0", value)``; tests read what the device was last given.
    last_tx : ndarray or None
        A copy of the data of the last ``tx()`` call.
    """

    def __init__(self, uri: str = "emulated:", *, air_endpoint: str = "tcp://127.0.0.1:7350",
                 snr_db: float = 30.0, profile: str = "awgn", doppler_hz: float = 0.0,
                 cfo_hz: float = 0.0, path_gain_db: float = 0.0, seed: int = 1,
                 overflow_every: int = 0, rx_timeout_every: int = 0, tx_underrun_every: int = 0,
                 vanish_after_s: float | None = None, vanish_for_s: float = 0.0,
                 clock_ppm: float = 0.0) -> None:
        check_values(dict(snr_db=snr_db, doppler_hz=doppler_hz, cfo_hz=cfo_hz,
                          path_gain_db=path_gain_db, overflow_every=overflow_every,
                          rx_timeout_every=rx_timeout_every, tx_underrun_every=tx_underrun_every,
                          vanish_for_s=vanish_for_s, clock_ppm=clock_ppm,
                          **({} if vanish_after_s is None else
                             {"vanish_after_s": vanish_after_s})),
                     EMULATED_LIMITS, prefix="emulated.")
        vanish_reference_s()
        self._vanish = (vanish_after_s, float(vanish_for_s))
        self._check_present()
        self.uri = uri
        self.air_endpoint = air_endpoint
        self._channel_args = dict(snr_db=float(snr_db), profile=profile,
                                  doppler_hz=float(doppler_hz), cfo_hz=float(cfo_hz))
        self.path_gain_db = float(path_gain_db)
        self.seed = int(seed)
        self.overflow_every = int(overflow_every)
        self.rx_timeout_every = int(rx_timeout_every)
        self.tx_underrun_every = int(tx_underrun_every)
        self.clock_ppm = float(clock_ppm)
        # pyadi-iio attributes (plain values: the emulation reads them when it needs them)
        self.sample_rate = 3_840_000
        self.rx_lo = 2_400_000_000
        self.tx_lo = 2_400_000_000
        self.rx_rf_bandwidth = 3_840_000
        self.tx_rf_bandwidth = 3_840_000
        self.gain_control_mode_chan0 = "manual"
        self.rx_hardwaregain_chan0 = _REFERENCE_GAIN_DB
        self.rx_buffer_size = 1024
        self.tx_cyclic_buffer = False
        self.rx_enabled_channels = [0]
        self.tx_enabled_channels = [0]
        self.counters: collections.Counter[str] = collections.Counter()
        self.history: list[tuple] = []
        self.last_tx: np.ndarray | None = None
        self._tx_gain_db = -10.0
        self._lock = threading.Lock()
        # receive side (made at the first rx(), on the thread that receives)
        self._rx_size: int | None = None
        self._air_rx: AirReceiver | None = None
        self._stream: StreamChannel | None = None
        self._rx_t0: float | None = None
        self._rx_done = 0
        self._carry = np.zeros(0, np.complex128)
        self._pos = 0.0
        # transmit side
        self._tx_size: int | None = None
        self._tx_cyclic: np.ndarray | None = None
        self._tx_queue: queue.Queue | None = None
        self._tx_stop = threading.Event()
        self._tx_thread: threading.Thread | None = None
        self._tx_error: BaseException | None = None
        self._tx_ready = threading.Event()
        self.air_tx_endpoint: str | None = None

    # ------------------------------------------------------------------ attributes

    @property
    def tx_hardwaregain_chan0(self) -> float:
        """Transmit gain, dB (0 or below: minus the attenuation)."""
        return self._tx_gain_db

    @tx_hardwaregain_chan0.setter
    def tx_hardwaregain_chan0(self, value: float) -> None:
        value = float(value)
        if not -MAX_ATTENUATION_DB <= value <= 0.0:
            raise ValueError(f"tx_hardwaregain_chan0={value} must be in "
                             f"[-{MAX_ATTENUATION_DB}, 0]")
        self._tx_gain_db = value
        self.history.append(("tx_hardwaregain_chan0", value))

    @property
    def air_counters(self) -> dict:
        """The receiving air's counters (``received``, ``silent_samples``, ``late_dropped``,
        ``malformed``); empty before the first ``rx()``."""
        air = self._air_rx
        return dict(air.counters) if air is not None else {}

    @property
    def tx_buffer_active(self) -> bool:
        """True while a transmit buffer exists (cyclic or streaming)."""
        return self._tx_size is not None

    def _check_present(self) -> None:
        if _vanished(*self._vanish):
            raise OSError(errno.ENODEV, "emulated radio vanished (fault injection)")

    # ------------------------------------------------------------------ receive

    def rx(self) -> np.ndarray:
        """One receive buffer (``rx_buffer_size`` samples at its creation), in ADC units."""
        with self._lock:
            self._check_present()
            if self._rx_size is None:
                self._rx_size = int(self.rx_buffer_size)
                self._air_rx = AirReceiver(self.air_endpoint)
                plan = make_plan(sample_rate_hz=float(self.sample_rate))
                self._stream = StreamChannel(plan, rng=np.random.default_rng(self.seed),
                                             **self._channel_args)
                self._rx_t0 = time.monotonic()
                self._rx_done = 0
            n = self._rx_size
            count = self.counters["rx_buffers"] + self.counters["rx_timeouts"] + 1
            fs = float(self.sample_rate) * (1.0 + self.clock_ppm * 1e-6)
        # the samples of this buffer have been "received" once the air has carried them
        due = self._rx_t0 + (self._rx_done + n) / fs
        delay = due - time.monotonic()
        if delay > 0:
            time.sleep(delay)
        # what this call takes off the air: the buffer, and what a fault loses with it
        lost = n if self.rx_timeout_every and count % self.rx_timeout_every == 0 else (
            n // 2 if self.overflow_every and count % self.overflow_every == 0 else 0)
        self._await_air(n + lost, fs)
        with self._lock:
            if self._air_rx is None:
                raise OSError(errno.EBADF, "receive buffer destroyed")
            self._air_rx.drain()
            self._rx_done += n
            if self.rx_timeout_every and count % self.rx_timeout_every == 0:
                self.counters["rx_timeouts"] += 1
                self._receive(n)  # the samples are lost
                raise TimeoutError(errno.ETIMEDOUT, "emulated receive timeout (fault injection)")
            if self.overflow_every and count % self.overflow_every == 0:
                self.counters["overflows"] += 1
                self._receive(n // 2)  # lost in the overflow
            self.counters["rx_buffers"] += 1
            y = self._receive(n)
        gain = _UNIT_TONE_ADC * 10.0 ** ((float(self.rx_hardwaregain_chan0) - _REFERENCE_GAIN_DB)
                                         / 20.0)
        adc = np.clip(np.rint(y.real * gain), -ADC_MAX - 1, ADC_MAX) + 1j * np.clip(
            np.rint(y.imag * gain), -ADC_MAX - 1, ADC_MAX)
        return adc

    def _await_air(self, n: int, fs: float) -> None:
        """While a transmitter is on the air, wait (up to ``_AIR_WAIT_S``) until it has carried
        this buffer's samples: its buffers arrive in bursts, and a receiver that read ahead of
        one would fill silence into the middle of the stream, which no radio does. With no
        transmitter (nothing heard for ``_AIR_QUIET_S``) the air is silence, on time."""
        deadline = time.monotonic() + _AIR_WAIT_S
        need = int(math.ceil(n / (1.0 + self.clock_ppm * 1e-6))) + 2 - self._carry.size
        while True:
            with self._lock:
                air = self._air_rx
                if air is None:
                    return
                queued = air.drain()
                last = air.last_arrival_s
            now = time.monotonic()
            if queued >= need or last is None or now - last > _AIR_QUIET_S or now > deadline:
                return
            time.sleep(0.001)

    def _receive(self, n: int) -> np.ndarray:
        """The next ``n`` samples at the receiver's sample clock (unit-tone scale)."""
        path = 10.0 ** (self.path_gain_db / 20.0)
        if self.clock_ppm == 0.0:
            return self._stream(self._air_rx.take(n) * path)
        step = 1.0 / (1.0 + self.clock_ppm * 1e-6)  # air samples per receiver sample
        need = int(math.floor(self._pos + (n - 1) * step)) + 2 - self._carry.size
        if need > 0:
            fresh = self._stream(self._air_rx.take(need) * path)
            self._carry = np.concatenate([self._carry, fresh])
        at = self._pos + np.arange(n) * step
        grid = np.arange(self._carry.size)
        out = np.interp(at, grid, self._carry.real) + 1j * np.interp(at, grid, self._carry.imag)
        end = self._pos + n * step
        drop = int(math.floor(end))
        self._carry, self._pos = self._carry[drop:], end - drop
        return out

    def rx_destroy_buffer(self) -> None:
        """Drop the receive buffer; the next ``rx()`` makes a new one."""
        with self._lock:
            if self._air_rx is not None:
                self._air_rx.close()
            self._air_rx, self._stream, self._rx_size = None, None, None
            self._carry, self._pos = np.zeros(0, np.complex128), 0.0

    # ------------------------------------------------------------------ transmit

    def tx(self, data: np.ndarray) -> None:
        """Send a buffer (cyclic or streaming, see the module notes)."""
        self._check_present()
        x = np.asarray(data).ravel()
        if not np.iscomplexobj(x):
            x = x.astype(np.complex128)
        if self._tx_error is not None:
            raise OSError(errno.EIO, f"emulated transmitter failed: {self._tx_error}")
        self.history.append(("tx", int(x.size)))
        self.last_tx = x.copy()
        # the DAC takes 16-bit words: what does not fit saturates
        words = np.clip(x.real, -32768, 32767) + 1j * np.clip(x.imag, -32768, 32767)
        if self._tx_size is not None and self._tx_cyclic is not None:
            raise RuntimeError("TX buffer is cyclic: call tx_destroy_buffer() first")
        if self._tx_size is not None and x.size != self._tx_size:
            raise ValueError(f"tx() got {x.size} samples; the buffer holds {self._tx_size} "
                             f"(tx_destroy_buffer() first to change it)")
        if self._tx_size is None:
            self._tx_size = x.size
            self._tx_queue = queue.Queue(maxsize=_TX_QUEUE)
            if self.tx_cyclic_buffer:
                self._tx_cyclic = words
            self._start_sender()
            if self._tx_cyclic is not None:
                return
        try:
            self._tx_queue.put(words, timeout=5.0)
        except queue.Full:
            raise TimeoutError(errno.ETIMEDOUT, "emulated transmit buffer stuck") from None

    def tx_destroy_buffer(self) -> None:
        """Stop transmitting and drop the buffer (the air goes silent)."""
        self.history.append(("tx_destroy_buffer",))
        self._stop_sender()
        self._tx_size, self._tx_cyclic, self._tx_queue = None, None, None

    def _start_sender(self) -> None:
        self._tx_stop.clear()
        self._tx_ready.clear()
        self._tx_error = None
        self._tx_thread = threading.Thread(target=self._send_loop, name="emulated-tx",
                                           args=(self._tx_queue, self._tx_cyclic,
                                                 self._tx_size), daemon=True)
        self._tx_thread.start()
        self._tx_ready.wait(10.0)
        if self._tx_error is not None:
            err, self._tx_error = self._tx_error, None
            self._tx_thread.join(5.0)
            self._tx_size, self._tx_cyclic, self._tx_queue = None, None, None
            raise OSError(errno.EADDRINUSE, str(err))

    def _stop_sender(self) -> None:
        self._tx_stop.set()
        if self._tx_thread is not None:
            self._tx_thread.join(5.0)
            self._tx_thread = None

    def _send_loop(self, buffers: queue.Queue, cyclic: np.ndarray | None, size: int) -> None:
        try:
            air = AirSender(self.air_endpoint)
        except OSError as exc:
            self._tx_error = exc
            self._tx_ready.set()
            return
        self.air_tx_endpoint = air.endpoint
        self._tx_ready.set()
        with air:
            period = size / float(self.sample_rate)
            next_s = time.monotonic()
            index = 0
            while not self._tx_stop.is_set():
                delay = next_s - time.monotonic()
                if delay > 0 and self._tx_stop.wait(delay):
                    break
                next_s += period
                self.counters["tx_periods"] += 1
                if self.tx_underrun_every and \
                        self.counters["tx_periods"] % self.tx_underrun_every == 0:
                    self.counters["underruns"] += 1  # the host missed this period
                    index += size
                    continue
                if cyclic is not None:
                    words = cyclic
                else:
                    try:
                        words = buffers.get_nowait()
                    except queue.Empty:
                        self.counters["underruns"] += 1
                        index += size
                        continue
                if _vanished(*self._vanish):
                    index += size
                    continue
                level = 10.0 ** (self._tx_gain_db / 20.0) / TX_FULL_SCALE
                air.send(index, (words * level).astype(np.complex64))
                self.counters["tx_buffers"] += 1
                index += size

    def close(self) -> None:
        """Destroy both buffers (what a context's teardown does). Idempotent."""
        if self._tx_thread is not None:
            self.tx_destroy_buffer()
        self.rx_destroy_buffer()

    def __enter__(self):
        return self

    def __exit__(self, *exc) -> None:
        self.close()
