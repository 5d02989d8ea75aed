"""A radio as the transmit sink: :class:`RadioSink` (pyadi-iio, or the emulated radio).

Each frame slot is one streaming ``tx()`` buffer (``tx_cyclic_buffer`` off), so the radio's
buffers pace the transmitter: ``send()`` blocks while the hardware is busy. Samples in
full-scale units become DAC words (full scale 2**14, the pyadi-iio convention for the AD936x
family). The hardware attenuation is set once from the config and never lowered by a map.

Silencing (``silence()``, and ``close()`` before anything else) does, in this order, each step
even if an earlier one failed: attenuation to the maximum (``tx_hardwaregain_chan0`` =
-89.75 dB), ``tx_destroy_buffer()``, one buffer of zeros, ``tx_destroy_buffer()`` again. The
device is left with no buffer, zero output last given and the attenuation at its maximum.

Supervision
-----------
A sink that opened its device itself (or was given ``open_device``) rebuilds a device that
fails or vanishes, as the receive driver does (:mod:`brimline.drivers.sources.radio`): a
``tx()`` that raises is counted (``timeouts`` or ``device_errors``), the device is silenced as
far as it still answers and dropped, and :attr:`RadioSink.state` is ``reconnecting``. Slots
offered meanwhile are not sent (``send()`` returns False; the transmitter is silent while the
device is down). :meth:`RadioSink.ready` reopens and configures a new device once
``reopen_backoff_s`` has passed since the fault, the wait doubling after each failed attempt up
to ``reopen_backoff_max_s``; ``reopen_max_attempts`` failed attempts in a row (0: never) make
the state ``failed`` and raise :class:`~brimline.daemon.errors.SinkError`. A reopened device
starts at the maximum attenuation and is set to ``attenuation_db`` with its first slot. A sink
given only ``device_object`` cannot reopen it: a failing ``tx()`` is a ``SinkError`` at once.
Counters: ``device_errors``, ``timeouts``, ``reconnects``, ``reconnect_failures``.

RF caution: this module drives a real transmitter. Operate only within your licence or the
band's licence-exempt rules (frequency, power, emission mask), put enough attenuation between
cabled TX and RX ports, keep clear of antennas for RF exposure; local regulations and licensed
practice take precedence.
"""

from __future__ import annotations

import errno
import logging
import math
from types import MappingProxyType
from typing import Any, Callable, Mapping

import numpy as np

from brimline.daemon.errors import SinkError
from brimline.daemon.limits import NON_NEGATIVE, POSITIVE, check_values
from brimline.drivers.devices.emulated import MAX_ATTENUATION_DB, TX_FULL_SCALE
from brimline.drivers.devices.factory import open_device as factory_open
from brimline.drivers.sinks.base import Sink

__all__ = ["RadioSink", "REOPEN_LIMITS", "check_reopen_settings"]

_log = logging.getLogger("brimline.tx")
_DEVICE_ERRORS = (OSError, RuntimeError, ValueError, AttributeError)

#: Limits of the reopening settings (``tx.reopen_*`` keys read them too).
REOPEN_LIMITS = MappingProxyType({
    "reopen_backoff_s": POSITIVE,
    "reopen_backoff_max_s": POSITIVE,
    "reopen_max_attempts": NON_NEGATIVE,
})


def check_reopen_settings(reopen_backoff_s: float, reopen_backoff_max_s: float) -> str | None:
    """The rule between the two waits: None when it holds, else the problem (for messages)."""
    if reopen_backoff_max_s < reopen_backoff_s:
        return (f"tx.reopen_backoff_max_s={reopen_backoff_max_s} must be >= "
                f"tx.reopen_backoff_s={reopen_backoff_s}")
    return None


class RadioSink(Sink):
    """Frame slots sent by a transceiver, its device rebuilt when it fails (see the notes).

    Parameters
    ----------
    sample_rate_hz : float
        Sample rate to set.
    center_hz : float
        Transmit LO frequency, Hz.
    attenuation_db : float
        Hardware transmit attenuation, dB (0 .. 89.75).
    backend, device, uri, emulated
        As for :func:`brimline.drivers.devices.factory.open_device`.
    device_object : object or None
        An already opened device (tests inject fakes); overrides ``backend``. Without
        ``open_device`` it is never reopened.
    open_device : callable or None
        ``open_device() -> device`` for the first device (unless ``device_object``) and every
        reopening; default: the factory with ``backend``, ``device``, ``uri``, ``emulated``.
    reopen_backoff_s, reopen_backoff_max_s : float
        First wait before reopening a failed device, and its cap (it doubles), s.
    reopen_max_attempts : int
        Failed reopenings in a row after which the sink fails (0: retry for ever).
    where : str
        Config key path of the device settings, for messages (``tx.radio``).

    Raises
    ------
    SinkError
        Missing pyadi-iio (with the install hint), unknown class, no device at the URI, or a
        setting the device refuses (at start: one line naming the URI).
    """

    name = "radio"
    paced = True

    def __init__(self, *, sample_rate_hz: float, center_hz: float, attenuation_db: float = 30.0,
                 backend: str = "iio", device: str = "Pluto", uri: str = "ip:192.168.2.1",
                 emulated: Mapping[str, Any] | None = None, device_object: Any = None,
                 open_device: Callable[[], Any] | None = None, reopen_backoff_s: float = 0.25,
                 reopen_backoff_max_s: float = 8.0, reopen_max_attempts: int = 0,
                 where: str = "tx.radio") -> None:
        super().__init__()
        if not 0.0 <= attenuation_db <= MAX_ATTENUATION_DB:
            raise SinkError(f"tx.attenuation_db={attenuation_db} must be in "
                            f"[0, {MAX_ATTENUATION_DB}]")
        if not math.isfinite(center_hz):
            raise SinkError("link.center_hz must be set to tune tx.radio")
        check_values(dict(reopen_backoff_s=reopen_backoff_s,
                          reopen_backoff_max_s=reopen_backoff_max_s,
                          reopen_max_attempts=reopen_max_attempts), REOPEN_LIMITS,
                     prefix="tx.", error=SinkError)
        problem = check_reopen_settings(reopen_backoff_s, reopen_backoff_max_s)
        if problem:
            raise SinkError(problem)
        self.attenuation_db = float(attenuation_db)
        self.uri = uri
        self.where = where
        self.sample_rate_hz = float(sample_rate_hz)
        self.center_hz = float(center_hz)
        self.reopen_backoff_s = float(reopen_backoff_s)
        self.reopen_backoff_max_s = float(reopen_backoff_max_s)
        self.reopen_max_attempts = int(reopen_max_attempts)
        if open_device is None and device_object is None:
            def open_device():
                return factory_open(backend=backend, device=device, uri=uri, emulated=emulated,
                                    where=where, error=SinkError)
        self._opener = open_device
        #: "running", "reconnecting" (the device is being rebuilt) or "failed".
        self.state = "running"
        self._delay = self.reopen_backoff_s
        self._retry_at_s: float | None = None
        self._failures = 0
        self._size: int | None = None
        sdr = device_object if device_object is not None else self._opener()
        self.device = sdr
        try:
            self._configure(sdr)
        except _DEVICE_ERRORS as exc:
            self._silence()
            raise SinkError(f"{where}.uri={uri}: {type(exc).__name__}: {exc}") from exc

    def _configure(self, sdr) -> None:
        fs = int(round(self.sample_rate_hz))
        sdr.tx_hardwaregain_chan0 = -MAX_ATTENUATION_DB  # quiet until the first slot
        sdr.sample_rate = fs
        sdr.tx_rf_bandwidth = fs
        sdr.tx_lo = int(round(self.center_hz))
        sdr.tx_cyclic_buffer = False
        self._quiet = True

    # ------------------------------------------------------------------ supervision

    def ready(self, now_s: float) -> bool:
        """True when a slot can go out now; a device being rebuilt is reopened when due.

        Raises
        ------
        SinkError
            ``reopen_max_attempts`` reopenings failed in a row (the state is then ``failed``).
        """
        if self.state == "running" or self._closed:
            return self.state == "running"
        if self.state == "failed":
            return False
        if self._retry_at_s is None:
            self._retry_at_s = now_s + self._delay
        if now_s < self._retry_at_s:
            return False
        try:
            sdr = self._opener()
            try:
                self._configure(sdr)
            except BaseException:
                self._tear_down(sdr)
                raise
        except (SinkError, *_DEVICE_ERRORS) as exc:
            self._failures += 1
            self.counters["reconnect_failures"] += 1
            if self.reopen_max_attempts and self._failures >= self.reopen_max_attempts:
                self.state = "failed"
                raise SinkError(f"{self.where}.uri={self.uri}: device gone after "
                                f"{self._failures} attempts: {type(exc).__name__}: {exc}"
                                ) from exc
            self._delay = min(2.0 * self._delay, self.reopen_backoff_max_s)
            self._retry_at_s = now_s + self._delay
            return False
        self.device = sdr
        self.state = "running"
        self.counters["reconnects"] += 1
        self._delay, self._retry_at_s, self._failures = self.reopen_backoff_s, None, 0
        _log.info("%s at %s: reopened", self.where, self.uri)
        return True

    def _fault(self, exc: BaseException) -> None:
        timeout = isinstance(exc, TimeoutError) or getattr(exc, "errno", None) == errno.ETIMEDOUT
        self.counters["timeouts" if timeout else "device_errors"] += 1
        _log.warning("%s at %s: %s: %s; silent until the device is reopened", self.where,
                     self.uri, "transmit timeout" if timeout else "device error",
                     f"{type(exc).__name__}: {exc}"[:200])
        self._silence_device(warn=False)  # as far as the failed device still answers
        self._tear_down(self.device)
        self.device = None
        self.state = "reconnecting"
        self._delay, self._retry_at_s, self._failures = self.reopen_backoff_s, None, 0

    @staticmethod
    def _tear_down(sdr) -> None:
        close = getattr(sdr, "close", None)
        if callable(close):
            try:
                close()
            except _DEVICE_ERRORS:
                pass

    # ------------------------------------------------------------------ sink

    def _send(self, samples: np.ndarray) -> None:
        if self.device is None:
            return  # being rebuilt: silent
        try:
            if self._quiet:
                self.device.tx_hardwaregain_chan0 = -self.attenuation_db
                self._quiet = False
            self._size = samples.size
            self.device.tx(samples.astype(np.complex128) * TX_FULL_SCALE)
        except _DEVICE_ERRORS as exc:
            if self._opener is None:
                raise SinkError(f"{self.where}.uri={self.uri}: transmit failed: "
                                f"{type(exc).__name__}: {exc}") from exc
            self._fault(exc)

    def _silence(self) -> None:
        self._silence_device(warn=True)

    def _silence_device(self, *, warn: bool) -> None:
        sdr = self.device
        if sdr is None:
            return  # no device: nothing is transmitting
        zeros = np.zeros(self._size or 1024, np.complex128)
        steps = (
            ("attenuation", lambda: setattr(sdr, "tx_hardwaregain_chan0", -MAX_ATTENUATION_DB)),
            ("destroy", sdr.tx_destroy_buffer),
            ("zeros", lambda: sdr.tx(zeros)),
            ("destroy", sdr.tx_destroy_buffer),
        )
        for what, step in steps:
            try:
                step()
            except _DEVICE_ERRORS as exc:  # keep going: every later step still helps
                self.counters[f"silence_failed:{what}"] += 1
                if warn:
                    _log.warning("%s: silencing step %s failed: %s", self.where, what, exc)
        self._quiet = True

    def _release(self) -> None:
        if self.device is not None:
            self._tear_down(self.device)
