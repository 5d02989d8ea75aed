"""A pyadi-iio radio as an estimate source: :class:`RadioDriver`.

pyadi-iio (``import adi``) is optional and imported only when a RadioDriver is built; without it
the driver raises ``SourceError("... install with pip install 'brimline[sdr]'")``. The radio's
receive buffers go through the same receiver DSP as recordings and the simulator.

RF caution: with ``transmit`` the radio sends the default-map frame continuously. Operate only
within your licence or the band's licence-exempt rules (frequency, power, emission mask), put
enough attenuation between cabled TX and RX ports, keep clear of antennas for RF exposure; local
regulations and licensed practice take precedence.
"""

from __future__ import annotations

import math
import time
from typing import Any, Iterator, Mapping

import numpy as np

from brimline.daemon.errors import ConfigError, SourceError
from brimline.daemon.records import Estimate, TonePlan
from brimline.drivers.devices.factory import INSTALL_HINT, load_adi as _load_device_library
from brimline.drivers.devices.factory import open_device
from brimline.drivers.link.frame import Transmitter, as_link_plan, map_arrays
from brimline.drivers.link.receiver import FrameScanner, Receiver
from brimline.drivers.sources.base import Driver

__all__ = ["RadioDriver", "load_adi"]

#: Receive samples come as integers of the 12-bit converter; this maps full scale to ~1.0.
_RX_SCALE = 1.0 / 2048.0
#: Transmit full scale of pyadi-iio's DAC interface (16-bit words, 12-bit converter).
_TX_SCALE = 2.0 ** 14


def load_adi():
    """Import pyadi-iio; a missing library becomes :class:`SourceError` with the install hint."""
    return _load_device_library(where="driver.radio", error=SourceError)


class RadioDriver(Driver):
    """Estimates from a pyadi-iio radio (ADALM-Pluto style single-channel transceiver).

    Parameters
    ----------
    plan : TonePlan
        Tone plan and frame layout; ``plan.center_hz`` tunes the radio.
    uri : str
        libiio context URI.
    device : str
        pyadi-iio class name (``Pluto``, ...).
    rx_gain_db : float
        Manual receive gain, dB.
    tx_attenuation_db : float
        Transmit attenuation, dB (only with ``transmit``).
    transmit : bool
        Send default-map frames cyclically from the same radio (cabled loopback tests).
    buffer_frames : int
        Receive buffer length in frames.
    default_bits : int
        Bits per tone of the transmitter's default map.
    sync_threshold : float
        Receiver frame detection threshold.
    backend : {"iio", "emulated"}
        Device backend (:func:`brimline.drivers.devices.factory.open_device`).
    emulated : mapping or None
        Settings of the emulated radio (the config's ``emulated:`` section).
    """

    name = "radio"

    def __init__(self, *, plan: TonePlan, uri: str = "ip:192.168.2.1", device: str = "Pluto",
                 rx_gain_db: float = 30.0, tx_attenuation_db: float = 30.0,
                 transmit: bool = False, buffer_frames: int = 4, default_bits: int = 2,
                 sync_threshold: float = 0.3, backend: str = "iio",
                 emulated: Mapping[str, Any] | None = None) -> None:
        super().__init__()
        self.plan = as_link_plan(plan)
        if not math.isfinite(self.plan.center_hz):
            raise ConfigError("link.center_hz must be set to tune driver.radio")
        sdr = open_device(backend=backend, device=device, uri=uri, emulated=emulated,
                          where="driver.radio", error=SourceError)
        fs = int(round(self.plan.sample_rate_hz))
        try:
            sdr.sample_rate = fs
            sdr.rx_rf_bandwidth = fs
            sdr.rx_lo = int(round(self.plan.center_hz))
            sdr.gain_control_mode_chan0 = "manual"
            sdr.rx_hardwaregain_chan0 = float(rx_gain_db)
            sdr.rx_buffer_size = int(buffer_frames) * self.plan.frame_len
            if transmit:
                sdr.tx_rf_bandwidth = fs
                sdr.tx_lo = int(round(self.plan.center_hz))
                sdr.tx_hardwaregain_chan0 = -abs(float(tx_attenuation_db))
                sdr.tx_cyclic_buffer = True
                seq, bits, power = map_arrays(self.plan, None, default_bits)
                sent = Transmitter(self.plan).frame(bits=bits, power_lin=power, map_seq=seq,
                                                    counter=0, rng=np.random.default_rng(0))
                gap = np.zeros(self.plan.frame_len, np.complex64)
                burst = np.concatenate([sent.samples, gap])
                sdr.tx(burst * (_TX_SCALE * 0.5 / max(np.abs(burst).max(), 1e-12)))
        except (OSError, RuntimeError, ValueError, AttributeError) as exc:
            raise SourceError(f"driver.radio.uri={uri}: {type(exc).__name__}: {exc}") from exc
        self._sdr = sdr
        self._transmit = bool(transmit)
        self.receiver = Receiver(self.plan, default_bits=default_bits,
                                 sync_threshold=sync_threshold, clip_level=0.999)

    def _frames(self) -> Iterator[Estimate]:
        scanner = FrameScanner(self.receiver)
        t0 = time.monotonic()
        count = 0
        last: int | None = None  # unwrapped frame number of the last estimate
        while not self.closed:
            try:
                raw = self._sdr.rx()
            except (OSError, RuntimeError, ValueError) as exc:
                if self.closed:
                    return
                raise SourceError(f"driver.radio: receive failed: {exc}") from exc
            samples = np.asarray(raw, dtype=np.complex64) * _RX_SCALE
            for offset, res in scanner.feed(samples):
                if res.reason:
                    self.counters[res.reason] += 1
                if not res.has_estimate:
                    continue
                self.counters["frames"] += 1
                # Frames are numbered by the transmitter's header counter (16 bits, unwrapped),
                # so a map's effective frame means the same frame at both ends.
                if res.header_ok:
                    frame = res.counter if last is None else \
                        last + ((res.counter - last) & 0xFFFF or 0x10000)
                else:
                    frame = count if last is None else last + 1
                last = frame
                yield res.to_estimate(plan=self.plan, frame=frame,
                                      time_s=t0 + offset / self.plan.sample_rate_hz)
                count += 1

    def _release(self) -> None:
        sdr, self._sdr = self._sdr, None
        for name in (("tx_destroy_buffer",) if self._transmit else ()) + ("rx_destroy_buffer",):
            try:
                getattr(sdr, name)()
            except (OSError, RuntimeError, AttributeError):
                pass
