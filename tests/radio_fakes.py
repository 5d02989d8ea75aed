"""A stand-in for a pyadi-iio receive device, with scripted faults (tests and benchmarks).

:class:`FakeRadio` serves a fixed sample stream (raw converter counts, 2048 = full scale) buffer
by buffer, cyclically, with pyadi-iio's buffer rule (the size is read when the buffer is made, on
the first ``rx()`` after creation or ``rx_destroy_buffer()``). :class:`FakeAir` is the factory
``open_device(uri)`` a RadioDriver takes; it holds the fault script shared by every device it
opens, so a device that is torn down and reopened carries on with the script:

* ``timeouts``: buffer numbers whose ``rx()`` raises ``TimeoutError`` (as libiio does);
* ``errors``: buffer numbers whose ``rx()`` raises ``OSError`` (device error);
* ``skips``: buffer numbers after which that many buffers of samples are lost (an overflow);
* ``bad``: buffer numbers whose reply is malformed (a list of two channels);
* ``vanish_opens``: how many openings fail (``OSError``) after a fault (a device that went away).

All invented for tests: no real device behaves exactly so.
"""

from __future__ import annotations

import threading
import time

import numpy as np


class FakeContext:
    """The libiio context part: timeout and version attributes."""

    def __init__(self) -> None:
        self.timeout_ms = None
        self.attrs = {"hw_model": "Bench stand-in Rev.Z", "fw_version": "v0.0-test"}
        self.version = (0, 99, "t3st")

    def set_timeout(self, ms: int) -> None:
        self.timeout_ms = ms


class FakeRadio:
    """One opened device (see the module docstring)."""

    def __init__(self, air: "FakeAir", uri: str) -> None:
        self.__dict__["_air"] = air
        self.__dict__["uri"] = uri
        self.__dict__["_ctx"] = FakeContext()
        self.__dict__["_buffer"] = None  # size of the live receive buffer
        self.__dict__["rx_buffer_size"] = 1024

    def __setattr__(self, key, value):
        self._air.calls.append(("set", key, value))
        self.__dict__[key] = value

    def rx(self):
        air = self._air
        with air.lock:
            if air.gone:
                raise OSError(19, "No such device")
            if self._buffer is None:
                self.__dict__["_buffer"] = int(self.rx_buffer_size)
                air.calls.append(("create_rx_buffer", self._buffer))
            k = air.buffer_index
            air.buffer_index += 1
            if k in air.timeouts:
                air.fault_times.append(time.perf_counter())
                raise TimeoutError(110, "Connection timed out")
            if k in air.errors:
                air.fault_times.append(time.perf_counter())
                air.gone = air.vanish_opens > 0
                raise OSError(5, "Input/output error")
            if k in air.bad:
                return [np.zeros(4), np.zeros(4)]
            n = self._buffer
            idx = (air.position + np.arange(n)) % air.stream.size
            air.position = (air.position + n * (1 + air.skips.get(k, 0))) % air.stream.size
            air.served += 1
            return air.stream[idx] * 2048.0

    def tx(self, samples):
        self._air.calls.append(("tx", float(np.abs(samples).max())))

    def rx_destroy_buffer(self):
        self._air.calls.append(("rx_destroy_buffer",))
        self.__dict__["_buffer"] = None

    def tx_destroy_buffer(self):
        self._air.calls.append(("tx_destroy_buffer",))


class FakeAir:
    """Device factory with a shared fault script (see the module docstring)."""

    def __init__(self, stream: np.ndarray, *, timeouts=(), errors=(), skips=None, bad=(),
                 vanish_opens: int = 0, absent: bool = False) -> None:
        self.stream = np.asarray(stream, np.complex128)
        self.timeouts, self.errors, self.bad = set(timeouts), set(errors), set(bad)
        self.skips = dict(skips or {})
        self.vanish_opens = int(vanish_opens)
        self.absent = absent
        self.lock = threading.Lock()
        self.calls: list[tuple] = []
        self.opened = 0
        self.failed_opens = 0
        self.buffer_index = 0
        self.position = 0
        self.served = 0
        self.gone = False
        self.fault_times: list[float] = []  # perf_counter() at each injected fault

    def __call__(self, uri: str) -> FakeRadio:
        with self.lock:
            if self.absent:
                raise OSError(111, f"Connection refused: {uri}")
            if self.gone:
                if self.failed_opens < self.vanish_opens:
                    self.failed_opens += 1
                    raise OSError(19, "No such device")
                self.gone = False
            self.opened += 1
            self.calls.append(("open", uri))
        return FakeRadio(self, uri)
