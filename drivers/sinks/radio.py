"""A radio as the transmit sink: :class:`RadioSink` (pyadi-iio, or the emulated radio).

Each frame slot is one streaming ``tx()`` buffer (``tx_cyclic_buffer`` off), so the radio's
buffers pace the transmitter: ``send()`` blocks while the hardware is busy. Samples in
full-scale units become DAC words (full scale 2**14, the pyadi-iio convention for the AD936x
family). The hardware attenuation is set once from the config and never lowered by a map.

Silencing (``silence()``, and ``close()`` before anything else) does, in this order, each step
even if an earlier one failed: attenuation to the maximum (``tx_hardwaregain_chan0`` =
-89.75 dB), ``tx_destroy_buffer()``, one buffer of zeros, ``tx_destroy_buffer()`` again. The
device is left with no buffer, zero output last given and the attenuation at its maximum.

RF caution: this module drives a real transmitter. Operate only within your licence or the
band's licence-exempt rules (frequency, power, emission mask), put enough attenuation between
cabled TX and RX ports, keep clear of antennas for RF exposure; local regulations and licensed
practice take precedence.
"""

from __future__ import annotations

import logging
import math
from typing import Any, Mapping

import numpy as np

from brimline.daemon.errors import SinkError
from brimline.drivers.devices.emulated import MAX_ATTENUATION_DB, TX_FULL_SCALE
from brimline.drivers.devices.factory import open_device
from brimline.drivers.sinks.base import Sink

__all__ = ["RadioSink"]

_log = logging.getLogger("brimline.tx")
_DEVICE_ERRORS = (OSError, RuntimeError, ValueError, AttributeError)


class RadioSink(Sink):
    """Frame slots sent by a transceiver.

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
        An already opened device (tests inject fakes); overrides ``backend``.

    Raises
    ------
    SinkError
        Missing pyadi-iio (with the install hint), unknown class, no device at the URI, or a
        setting the device refuses.
    """

    name = "radio"
    paced = True

    def __init__(self, *, sample_rate_hz: float, center_hz: float, attenuation_db: float = 30.0,
                 backend: str = "iio", device: str = "Pluto", uri: str = "ip:192.168.2.1",
                 emulated: Mapping[str, Any] | None = None, device_object: Any = None) -> None:
        super().__init__()
        if not 0.0 <= attenuation_db <= MAX_ATTENUATION_DB:
            raise SinkError(f"tx.attenuation_db={attenuation_db} must be in "
                            f"[0, {MAX_ATTENUATION_DB}]")
        if not math.isfinite(center_hz):
            raise SinkError("link.center_hz must be set to tune tx.radio")
        self.attenuation_db = float(attenuation_db)
        self.uri = uri
        sdr = device_object if device_object is not None else open_device(
            backend=backend, device=device, uri=uri, emulated=emulated, where="tx.radio",
            error=SinkError)
        self.device = sdr
        fs = int(round(sample_rate_hz))
        try:
            sdr.tx_hardwaregain_chan0 = -MAX_ATTENUATION_DB  # quiet until the first slot
            sdr.sample_rate = fs
            sdr.tx_rf_bandwidth = fs
            sdr.tx_lo = int(round(center_hz))
            sdr.tx_cyclic_buffer = False
        except _DEVICE_ERRORS as exc:
            self._silence()
            raise SinkError(f"tx.radio.uri={uri}: {type(exc).__name__}: {exc}") from exc
        self._quiet = True
        self._size: int | None = None

    def _send(self, samples: np.ndarray) -> None:
        try:
            if self._quiet:
                self.device.tx_hardwaregain_chan0 = -self.attenuation_db
                self._quiet = False
            self._size = samples.size
            self.device.tx(samples.astype(np.complex128) * TX_FULL_SCALE)
        except _DEVICE_ERRORS as exc:
            raise SinkError(f"tx.radio.uri={self.uri}: transmit failed: "
                            f"{type(exc).__name__}: {exc}") from exc

    def _silence(self) -> None:
        sdr = self.device
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
                _log.warning("tx.radio: silencing step %s failed: %s", what, exc)
        self._quiet = True

    def _release(self) -> None:
        close = getattr(self.device, "close", None)
        if callable(close):
            try:
                close()
            except _DEVICE_ERRORS:
                pass
