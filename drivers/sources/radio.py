"""A pyadi-iio radio as an estimate source, run as a supervised worker: :class:`RadioDriver`.

pyadi-iio (``import adi``) is optional and imported only when a RadioDriver is built without a
device factory; without it the driver raises ``SourceError("... install with pip install
'brimline[sdr]'")``. The radio's receive buffers go through the same receiver DSP as recordings
and the simulator, by a :class:`~brimline.drivers.link.receiver.FrameScanner`: the frames
located in a buffer are estimated together, in one pass (``buffer_frames`` sets how many), and
one that fails (no sync, a failed header, clipping) is counted under its reason on its own.

Supervision
-----------
The device is opened through a *device factory*, ``open_device(uri) -> device``: by default
:func:`pyadi_factory` (the pyadi-iio class named by ``device``); tests and the emulated radio
pass their own. The driver needs of a device only what it uses of pyadi-iio's: the attributes
written by :meth:`RadioDriver.configure`, ``rx()``, ``tx()``, ``rx_destroy_buffer()``,
``tx_destroy_buffer()`` and, when present, ``_ctx`` (libiio context: ``set_timeout(ms)``,
``attrs``, ``version``).

* At start the device is opened once; a device that does not answer is one
  :class:`SourceError` naming the URI (``run`` and ``run --check`` exit with 2).
* While running, a receive timeout (``rx_timeout_s``, set as the libiio context timeout), a
  device error or a device that vanished tears the whole device down (buffers destroyed, the
  object dropped) and opens it again after ``backoff_s``, doubling up to ``backoff_max_s``;
  ``max_attempts`` failed openings in a row end the source (0: never). Meanwhile the driver
  yields nothing, the daemon's staleness rule (``fallback.stale_after_s``) sends the safe map,
  and :attr:`RadioDriver.state` is ``reconnecting`` (``running`` or ``failed`` otherwise).
* A reply of ``rx()`` that is not a 1-D numeric array of the buffer's length with finite values
  is counted (``bad_buffers``) and dropped, never raised.
* Buffers are never assumed contiguous: the frame counters in the headers are checked by
  :class:`~brimline.drivers.link.continuity.Continuity` (lost frames, suspected overflows), and
  an estimate from a frame spliced across lost samples is yielded with ``valid=False``.
* Buffer settings change only through :meth:`RadioDriver.rebuild_buffers`: destroy, then set
  (pyadi-iio creates a buffer on the first ``rx()``/``tx()`` and ignores later size changes).
* The library and device versions are logged at start (:func:`device_versions`).

Counters (reach the status stream as ``driver.counters``): ``frames``, the receiver's reasons,
``timeouts``, ``device_errors``, ``reconnects``, ``reconnect_failures``, ``bad_buffers``,
``buffers`` and the continuity counts (``lost_frames``, ``suspected_overflows``,
``damaged_frames``, ``counter_repeats``, ``counter_jumps``).

Sample clock offset: with the transmitter's frame rate known (``frame_rate_hz``, so its slot
length in samples), :attr:`RadioDriver.clock_offset_ppm` is the receiver's sample clock offset
against the transmitter's, fitted by :class:`~brimline.drivers.link.clock.ClockFit` from the
start positions of the frames with a readable header against their unwrapped counters, within
stretches of the stream with no lost samples: the fit starts again with a new stream (after a
reconnect), after a malformed buffer (its samples are not counted in the positions) and at a
suspected overflow (the positions do not count the samples lost); a loss nobody reported shows
as a start off the fitted line and restarts it too. None until enough frames of one stretch
(or without ``frame_rate_hz``: a slot length taken from the received spacing would contain the
offset it is meant to measure).

Estimates carry ``time_s`` on the driver's clock (monotonic by default): the arrival time of
their buffer less the samples that came after the frame.

Single-radio loopback: with ``transmit`` this driver still only receives; the daemon runs
``brimline tx``'s transmitter loop on the same radio, following its own maps
(:mod:`brimline.daemon.runtime.loopback`, with ``tx_attenuation_db`` and this driver's backoff
settings), so the frame counters in the headers advance and maps switch at their frames.

IQ capture while running (``record.iq``): given a capture writer (``capture=``, opened and
closed by the runtime), every good receive buffer is copied into it through the same
:class:`~brimline.drivers.sources.base.CaptureFeed` as the recorded-IQ source uses, with a new
capture segment where the stream broke: ``overflow`` at the buffer boundary where the frame
counters say samples were lost, ``gap`` before the buffer after a malformed (dropped) one and
before the first buffer after a reconnect. The number of samples lost is not known there (the
counters count frames, not samples), so those segments carry none. An overflow is seen only
once the next readable header has been read, which may be in the following buffer; so a buffer
is copied once the one after it has been scanned (the last ones when the source stops).

RF caution: with ``transmit`` the radio transmits. Operate only within your licence or the band's
licence-exempt rules (frequency, power, emission mask), put enough attenuation between cabled TX
and RX ports, keep clear of antennas for RF exposure; local regulations and licensed practice
take precedence.
"""

from __future__ import annotations

import dataclasses
import errno
import importlib
import logging
import math
import sys
import threading
import time
from typing import Any, Callable, Iterator, Mapping

import numpy as np

from brimline.daemon.errors import ConfigError, SourceError
from brimline.daemon.limits import FINITE, NON_NEGATIVE, POSITIVE, at_least, between, check_values
from brimline.daemon.records import Estimate, TonePlan
from brimline.drivers.devices.factory import open_device as open_backend
from brimline.drivers.link.clock import ClockFit
from brimline.drivers.link.continuity import Continuity
from brimline.drivers.link.frame import as_link_plan, slot_samples
from brimline.drivers.link.receiver import FrameScanner, Receiver
from brimline.drivers.sources.base import CaptureFeed, Driver

__all__ = ["RadioDriver", "RADIO_LIMITS", "DeviceFactory", "load_adi", "pyadi_factory",
           "device_versions", "probe_radio", "INSTALL_HINT"]

log = logging.getLogger("brimline.sources.radio")

INSTALL_HINT = "install with pip install 'brimline[sdr]'"
#: Receive samples come as integers of the 12-bit converter; this maps full scale to ~1.0.
_RX_SCALE = 1.0 / 2048.0
#: What opening, configuring or reading a device may raise. libiio errors arrive as OSError
#: (TimeoutError among them), pyadi-iio's attribute writes as ValueError or AttributeError, and
#: some pyadi-iio paths raise a bare Exception: a device's answer is untrusted input, so any
#: Exception from a device call is a device fault (counted, reopened), never a crash. At start
#: it is one SourceError line naming the URI and the exception type.
_DEVICE_ERRORS = (Exception,)

#: Opens the device at a URI; returns an object with pyadi-iio's receive interface.
DeviceFactory = Callable[[str], Any]

#: Limits of the radio settings (``driver.radio.*``), checked by the constructor and the config.
RADIO_LIMITS = {
    "rx_gain_db": FINITE,
    "tx_attenuation_db": between(0.0, 89.75),
    "buffer_frames": at_least(1),
    "default_bits": at_least(0),
    "sync_threshold": between(0.0, 1.0, low_open=True, high_open=True),
    "rx_timeout_s": between(0.001, 60.0),
    "backoff_s": POSITIVE,
    "backoff_max_s": POSITIVE,
    "max_attempts": NON_NEGATIVE,
    "frame_rate_hz": POSITIVE,  # or None (unknown)
}


def load_adi():
    """Import pyadi-iio; a missing library becomes :class:`SourceError` with the install hint."""
    try:
        return importlib.import_module("adi")
    except ImportError as exc:
        raise SourceError(f"driver.radio needs pyadi-iio ({exc}); {INSTALL_HINT}") from exc


def pyadi_factory(device: str = "Pluto") -> DeviceFactory:
    """The device factory of a pyadi-iio class: ``open(uri)`` returns ``adi.<device>(uri=uri)``.

    Raises
    ------
    SourceError
        pyadi-iio is not installed (with the install hint).
    ConfigError
        ``device`` is not a pyadi-iio class.
    """
    adi = load_adi()
    cls = getattr(adi, device, None)
    if not isinstance(cls, type):
        raise ConfigError(f"driver.radio.device={device!r} is not a pyadi-iio class")

    def open_device(uri: str):
        return cls(uri=uri)
    return open_device


def device_versions(device: Any) -> dict[str, str]:
    """Library and device versions as strings, for the start-up log (missing ones left out).

    Reads ``adi.__version__``, libiio's ``iio.version`` (major, minor, git tag), the context's
    backend ``version`` and its ``fw_version``/``hw_model`` attributes. Never raises: a device's
    answer is untrusted input.
    """
    out: dict[str, str] = {}

    def text(value: Any) -> str:
        if isinstance(value, (tuple, list)):
            return ".".join(str(v) for v in value[:2]) + (f" ({value[2]})" if len(value) > 2
                                                           else "")
        return str(value)[:80]

    try:
        adi = sys.modules.get("adi")
        if adi is not None and hasattr(adi, "__version__"):
            out["pyadi-iio"] = text(adi.__version__)
        iio = sys.modules.get("iio")
        if iio is not None and hasattr(iio, "version"):
            out["libiio"] = text(iio.version)
        ctx = getattr(device, "_ctx", None)
        if ctx is not None:
            if getattr(ctx, "version", None) is not None:
                out["backend"] = text(ctx.version)
            attrs = getattr(ctx, "attrs", None) or {}
            for key in ("hw_model", "fw_version", "hw_serial"):
                if key in attrs:
                    out[key] = text(attrs[key])
    except Exception as exc:  # noqa: BLE001 - a version probe must never stop a start
        out["error"] = f"{type(exc).__name__}: {exc}"[:80]
    return out


def probe_radio(uri: str, device: str = "Pluto", *,
                open_device: DeviceFactory | None = None) -> dict[str, str]:
    """Open the device at ``uri`` and close it again, touching no setting (``run --check``).

    Returns
    -------
    dict
        :func:`device_versions` of the device.

    Raises
    ------
    SourceError
        pyadi-iio missing (with the install hint), or no device answers at ``uri`` (one line
        naming it).
    ConfigError
        ``device`` is not a pyadi-iio class.
    """
    opener = open_device if open_device is not None else pyadi_factory(device)
    try:
        dev = opener(uri)
    except _DEVICE_ERRORS as exc:
        raise SourceError(f"driver.radio.uri={uri}: no device answers: "
                          f"{type(exc).__name__}: {exc}") from exc
    versions = device_versions(dev)
    del dev  # pyadi-iio releases the context with the object; no buffer was made
    return versions


class RadioDriver(Driver):
    """Estimates from a pyadi-iio radio (ADALM-Pluto style single-channel transceiver).

    Parameters
    ----------
    plan : TonePlan
        Tone plan and frame layout; ``plan.center_hz`` tunes the radio.
    uri : str
        libiio context URI.
    device : str
        pyadi-iio class name (``Pluto``, ...); used when ``open_device`` is not given.
    rx_gain_db : float
        Manual receive gain, dB.
    tx_attenuation_db : float
        Transmit attenuation, dB (only with ``transmit``; read by the loopback transmitter).
    transmit : bool
        The daemon also transmits from this radio, following its own maps (single-radio
        loopback through attenuators; the runtime runs the transmitter, not this driver).
    buffer_frames : int
        Receive buffer length in frames.
    default_bits : int
        Bits per tone of the transmitter's default map.
    sync_threshold : float
        Receiver frame detection threshold.
    rx_timeout_s : float
        Receive timeout (libiio context timeout); a buffer not filled by then is a fault.
    backoff_s, backoff_max_s : float
        First wait before reopening a faulty device, and its cap (the wait doubles), s.
    max_attempts : int
        Failed openings in a row after which the source fails (0: retry for ever).
    frame_rate_hz : float or None
        Frame slots per second of the transmitter heard (its ``tx.frame_rate_hz``): its slot
        length, ``round(sample rate / frame_rate_hz)`` samples, is what the sample clock offset
        is measured against. None: unknown, no offset is measured.
    backend : {"iio", "emulated"}
        Device backend when ``open_device`` is not given: pyadi-iio, or the emulated radio
        (:func:`brimline.drivers.devices.factory.open_device`) with the ``emulated`` settings.
    emulated : mapping or None
        Settings of the emulated radio (the config's ``emulated:`` section).
    open_device : callable, optional
        Device factory ``open_device(uri) -> device`` (tests, the emulated radio); default
        :func:`pyadi_factory` of ``device``.
    clock : callable
        Clock of the estimates' ``time_s``, s (monotonic).
    capture : CaptureWriter, optional
        The runtime's IQ capture (``record.iq``; not a config key of this section): receive
        buffers are copied into it (see the module docstring). The runtime closes it.

    Raises
    ------
    SourceError
        pyadi-iio missing (install hint), or no device answers at ``uri`` at start.
    ConfigError
        A setting out of its limit, ``link.center_hz`` unset, or an unknown ``device``.
    """

    name = "radio"

    def __init__(self, *, plan: TonePlan, uri: str = "ip:192.168.2.1", device: str = "Pluto",
                 rx_gain_db: float = 30.0, tx_attenuation_db: float = 30.0,
                 transmit: bool = False, buffer_frames: int = 4, default_bits: int = 2,
                 sync_threshold: float = 0.3, rx_timeout_s: float = 1.0,
                 backoff_s: float = 0.25, backoff_max_s: float = 8.0, max_attempts: int = 0,
                 frame_rate_hz: float | None = None, backend: str = "iio",
                 emulated: Mapping[str, Any] | None = None,
                 open_device: DeviceFactory | None = None,
                 clock: Callable[[], float] = time.monotonic, capture=None) -> None:
        super().__init__()
        check_values(dict(rx_gain_db=rx_gain_db, tx_attenuation_db=tx_attenuation_db,
                          buffer_frames=buffer_frames, default_bits=default_bits,
                          sync_threshold=sync_threshold, rx_timeout_s=rx_timeout_s,
                          backoff_s=backoff_s, backoff_max_s=backoff_max_s,
                          max_attempts=max_attempts,
                          **({} if frame_rate_hz is None else
                             {"frame_rate_hz": frame_rate_hz})),
                     RADIO_LIMITS, prefix="driver.radio.", error=ConfigError)
        if backoff_max_s < backoff_s:
            raise ConfigError(f"driver.radio.backoff_max_s={backoff_max_s} must be >= "
                              f"driver.radio.backoff_s={backoff_s}")
        self.plan = as_link_plan(plan)
        if not math.isfinite(self.plan.center_hz):
            raise ConfigError("link.center_hz must be set to tune driver.radio")
        if not 0 <= default_bits <= self.plan.max_bits:
            raise ConfigError(f"driver.radio.default_bits={default_bits} must be in "
                              f"[0, link.max_bits={self.plan.max_bits}]")
        #: Frame slots per second of the transmitter heard, or None when not known (gives the
        #: status its data rate).
        self.frame_rate_hz: float | None = None if frame_rate_hz is None else float(frame_rate_hz)
        #: Samples per transmitter frame slot, or None when its frame rate is not known.
        self.slot_samples: int | None = None
        if frame_rate_hz is not None:
            try:
                self.slot_samples = slot_samples(self.plan, frame_rate_hz,
                                                 "driver.radio.frame_rate_hz")
            except ValueError as exc:
                raise ConfigError(str(exc)) from None
        self._clock_fit = None if self.slot_samples is None else ClockFit(self.slot_samples)
        self._clock_overflows = 0  # suspected overflows of the stream seen by the clock fit
        self.uri = str(uri)
        self.settings = dict(rx_gain_db=float(rx_gain_db),
                             tx_attenuation_db=float(tx_attenuation_db))
        self.transmit = bool(transmit)
        self.buffer_size = int(buffer_frames) * self.plan.frame_len
        self.rx_timeout_s = float(rx_timeout_s)
        self.backoff_s, self.backoff_max_s = float(backoff_s), float(backoff_max_s)
        self.max_attempts = int(max_attempts)
        if open_device is None:
            open_device = (pyadi_factory(device) if backend == "iio"
                           else _factory_of(backend, device, emulated))
        self._open_device = open_device
        self._clock = clock
        self._capture = CaptureFeed(capture, self.counters, log)
        self.receiver = Receiver(self.plan, default_bits=default_bits,
                                 sync_threshold=sync_threshold, clip_level=0.999)
        #: "running", "reconnecting" or "failed" (read by the service for the status stream).
        self.state = "running"
        #: Library and device versions found at start (also logged).
        self.versions: dict[str, str] = {}
        self._device = None
        self._lock = threading.Lock()
        self._worker = False  # a thread is in frames() and owns the device
        try:
            self._device = self._open()
        except _DEVICE_ERRORS as exc:
            raise SourceError(f"driver.radio.uri={self.uri}: no device answers: "
                              f"{type(exc).__name__}: {exc}") from exc
        self.versions = device_versions(self._device)
        log.info("radio at %s: %s", self.uri,
                 ", ".join(f"{k} {v}" for k, v in self.versions.items()) or "versions unknown")

    @property
    def clock_offset_ppm(self) -> float | None:
        """The receiver's sample clock offset against the transmitter's, ppm (positive: the
        receiver's runs fast), or None before enough frames of one stretch of the stream or
        without ``frame_rate_hz`` (see the module docstring)."""
        fit = self._clock_fit
        return None if fit is None else fit.offset_ppm

    # ------------------------------------------------------------------ device handling

    def _open(self):
        """Open and configure the device (raises what the device raises)."""
        device = self._open_device(self.uri)
        try:
            self.configure(device)
        except BaseException:
            self._tear_down(device)
            raise
        return device

    def configure(self, device) -> None:
        """Tune a freshly opened device, set its timeout and its receive buffer."""
        fs = int(round(self.plan.sample_rate_hz))
        ctx = getattr(device, "_ctx", None)
        if ctx is not None and hasattr(ctx, "set_timeout"):
            ctx.set_timeout(int(math.ceil(self.rx_timeout_s * 1000)))
        device.sample_rate = fs
        device.rx_rf_bandwidth = fs
        device.rx_lo = int(round(self.plan.center_hz))
        device.gain_control_mode_chan0 = "manual"
        device.rx_hardwaregain_chan0 = self.settings["rx_gain_db"]
        self.rebuild_buffers(device)

    def rebuild_buffers(self, device) -> None:
        """The one place buffer settings change: destroy the receive buffer, then size it.

        pyadi-iio creates its buffer on the first ``rx()`` and keeps its size; a size written
        later takes effect only after ``rx_destroy_buffer()``.
        """
        device.rx_destroy_buffer()
        device.rx_buffer_size = self.buffer_size

    @staticmethod
    def _tear_down(device) -> None:
        """Destroy a device's buffers, ignoring what a broken device answers."""
        for name in ("tx_destroy_buffer", "rx_destroy_buffer"):
            try:
                getattr(device, name)()
            except _DEVICE_ERRORS:
                pass

    def _samples(self, raw) -> np.ndarray | None:
        """A receive buffer as complex64 at full scale 1.0, or None for a malformed reply."""
        try:
            arr = np.asarray(raw)
            if (arr.ndim != 1 or arr.size != self.buffer_size
                    or arr.dtype.kind not in "iufc"):
                return None
            samples = arr.astype(np.complex64) * np.float32(_RX_SCALE)
        except Exception:  # noqa: BLE001 - a device reply is untrusted input
            return None
        if not np.isfinite(samples.view(np.float32).sum(dtype=np.float64)):
            return None
        return samples

    # ------------------------------------------------------------------ the worker

    def _fault(self, exc: BaseException) -> None:
        timeout = isinstance(exc, TimeoutError) or getattr(exc, "errno", None) == errno.ETIMEDOUT
        self.counters["timeouts" if timeout else "device_errors"] += 1
        log.warning("radio at %s: %s: %s; reopening", self.uri,
                    "receive timeout" if timeout else "device error",
                    f"{type(exc).__name__}: {exc}"[:200])
        device, self._device = self._device, None
        if device is not None:
            self._tear_down(device)
        self.state = "reconnecting"

    def _reopen(self) -> bool:
        """Reopen with capped exponential backoff until it works (True) or the driver closes."""
        delay, failures = self.backoff_s, 0
        while True:
            if self._closed.wait(delay):
                return False
            try:
                self._device = self._open()
            except _DEVICE_ERRORS as exc:
                failures += 1
                self.counters["reconnect_failures"] += 1
                if self.max_attempts and failures >= self.max_attempts:
                    self.state = "failed"
                    raise SourceError(f"driver.radio.uri={self.uri}: device gone after "
                                      f"{failures} attempts: {type(exc).__name__}: {exc}"
                                      ) from exc
                delay = min(2.0 * delay, self.backoff_max_s)
                continue
            self.counters["reconnects"] += 1
            self.state = "running"
            log.info("radio at %s: reopened", self.uri)
            return True

    def _frames(self) -> Iterator[Estimate]:
        with self._lock:
            if self.closed:
                return
            self._worker = True
        try:
            yield from self._work()
        finally:
            with self._lock:
                self._worker = False
                device, self._device = self._device, None
            if device is not None:
                self._tear_down(device)

    def _work(self) -> Iterator[Estimate]:
        copy = _LaggedCopy(self._capture)
        try:
            yield from self._streams(copy)
        finally:
            copy.flush()

    def _streams(self, copy: "_LaggedCopy") -> Iterator[Estimate]:
        fs = self.plan.sample_rate_hz
        count = 0
        last_frame: int | None = None  # unwrapped number of the last estimate's frame
        last_time = -math.inf
        while not self.closed:
            if self._device is None:
                if not self._reopen():
                    return
                copy.mark(0, "gap")  # a new stream: samples were lost while reconnecting
            scanner, continuity, fed = FrameScanner(self.receiver), Continuity(), 0
            self._clock_restart()  # a new stream: positions count from 0 again
            self._clock_overflows = 0
            while not self.closed:
                device = self._device
                if device is None:
                    return
                try:
                    raw = device.rx()
                except _DEVICE_ERRORS as exc:
                    if self.closed:
                        return
                    self._fault(exc)
                    before = dict(continuity.counters)
                    continuity.restart()  # frames held across the fault are dropped (damaged)
                    self._merge(continuity, before)
                    copy.flush()  # the old stream ends here
                    break
                arrived = self._clock()
                samples = self._samples(raw)
                if samples is None:
                    self.counters["bad_buffers"] += 1
                    self._clock_restart()  # its samples are missing from the positions
                    copy.mark(fed, "gap")  # the next good buffer follows lost samples
                    continue
                self.counters["buffers"] += 1
                continuity.boundary(fed)
                copy.add(fed, samples)
                fed += samples.size
                before = dict(continuity.counters)
                for start, res in scanner.feed(samples):
                    if res.reason:
                        self.counters[res.reason] += 1
                    if not res.has_estimate:
                        continue
                    end = start - res.start + res.end
                    t = arrived - (fed - end) / fs
                    for est, ok in continuity.frame(
                            (res, t, start - self.plan.cp_len), start=start - self.plan.cp_len,
                            end=end, header_ok=res.header_ok, counter=res.counter):
                        frame_res, frame_t, frame_start = est
                        frame_t = max(frame_t, last_time + 1.0 / fs)
                        last_time = frame_t
                        # Frames are numbered by the transmitter's header counter (16 bits,
                        # unwrapped), so a map's effective_frame names the same frame at both
                        # ends; a frame whose header failed takes the next number.
                        if frame_res.header_ok:
                            count = frame_res.counter if last_frame is None else \
                                last_frame + ((frame_res.counter - last_frame) & 0xFFFF or 0x10000)
                        elif last_frame is not None:
                            count = last_frame + 1
                        last_frame = count
                        self._clock_frame(continuity, frame_res.header_ok and ok, frame_start,
                                          count)
                        estimate = frame_res.to_estimate(plan=self.plan, frame=count,
                                                         time_s=frame_t)
                        if not ok:
                            estimate = dataclasses.replace(estimate, valid=False)
                        self.counters["frames"] += 1
                        yield estimate
                self._merge(continuity, before)
                for position in continuity.overflow_positions:
                    copy.mark(position, "overflow")
                continuity.overflow_positions.clear()
                copy.settle()

    def _clock_restart(self) -> None:
        if self._clock_fit is not None:
            self._clock_fit.restart()

    def _clock_frame(self, continuity: Continuity, usable: bool, start: int,
                     count: int) -> None:
        """A judged frame for the clock fit: its start and number when ``usable`` (a readable
        header, not spliced across lost samples); a suspected overflow first ends the stretch."""
        fit = self._clock_fit
        if fit is None:
            return
        overflows = continuity.counters["suspected_overflows"]
        if overflows != self._clock_overflows:
            self._clock_overflows = overflows
            fit.restart()  # samples were lost somewhere before this frame
        if usable:
            fit.add(start, count)

    def _merge(self, continuity: Continuity, before: dict) -> None:
        for key, value in continuity.counters.items():
            if value != before.get(key, 0):
                self.counters[key] += value - before.get(key, 0)

    def _release(self) -> None:
        # The worker thread owns the device while it runs (a blocked rx() returns within
        # rx_timeout_s) and tears it down as it leaves; otherwise it is torn down here.
        with self._lock:
            if self._worker:
                return
            device, self._device = self._device, None
        if device is not None:
            self._tear_down(device)


class _LaggedCopy:
    """Receive buffers on their way to the IQ capture, copied once the next one is scanned.

    ``add(position, samples)`` queues a buffer before it is scanned; ``mark(position,
    reason)`` notes a break of the stream before the buffer that starts at ``position`` (the
    first reason given wins); ``settle()``, after a scan, copies every queued buffer but the
    newest, starting a capture segment first where one is marked. A break noted only after
    its buffer was copied starts the segment at the next buffer copied.
    """

    def __init__(self, feed: CaptureFeed) -> None:
        self.feed = feed
        self._pending: list[tuple[int, np.ndarray]] = []
        self._marks: dict[int, str] = {}

    def mark(self, position: int, reason: str) -> None:
        if self.feed.active:
            self._marks.setdefault(int(position), reason)

    def add(self, position: int, samples: np.ndarray) -> None:
        if self.feed.active:
            self._pending.append((int(position), samples))

    def settle(self) -> None:
        while len(self._pending) > 1:
            self._copy(*self._pending.pop(0))

    def flush(self) -> None:
        """Copy every queued buffer; the stream ends (positions start again from 0)."""
        while self._pending:
            self._copy(*self._pending.pop(0))
        self._marks.clear()  # breaks after the last buffer: the next stream starts with its own

    def _copy(self, position: int, samples: np.ndarray) -> None:
        reason = self._marks.pop(position, None)
        for p in [p for p in self._marks if p < position]:  # noticed too late for its place
            reason = reason or self._marks[p]
            del self._marks[p]
        if reason == "overflow":
            self.feed.overflow(None)
        elif reason == "gap":
            self.feed.gap(None)
        self.feed.write(samples)


def _factory_of(backend: str, device: str, emulated: Mapping[str, Any] | None) -> DeviceFactory:
    """A device factory ``open_device(uri)`` for a backend of :mod:`brimline.drivers.devices`."""
    def open_device(uri: str):
        return open_backend(backend=backend, device=device, uri=uri, emulated=emulated,
                            where="driver.radio", error=SourceError)
    return open_device
