"""Single-radio loopback (``driver.radio.transmit: true``): the daemon's own radio transmits.

The transmitter is ``brimline tx``'s: a :class:`~brimline.daemon.runtime.transmitter.TxLoop`
built by :func:`~brimline.daemon.runtime.assemble.build_tx` around a supervised
:class:`~brimline.drivers.sinks.radio.RadioSink`, following the daemon's own maps through a
:class:`~brimline.daemon.net.follower.Follower` on its bound endpoints (with the daemon's CURVE
pair when ``publish.curve_secret_key`` is set), switching maps at the frames they name and
acknowledging them. Nothing here builds frames.

The sink opens its own device handle on ``driver.radio``'s ``backend``, ``uri`` and
``device`` with ``driver.radio.tx_attenuation_db`` and rebuilds it with the receive driver's
backoff settings; frame rate, digital backoff, power bound, hold and loss behaviour are the
``tx:`` section's (its sink, backend and uri keys are not used here). For the emulated radio the
two handles meet on ``emulated.air_endpoint`` as two radios would; libiio's network backend
serves several handles on one radio.

The loop runs on its own thread, which owns the follower's sockets and the device handle. A
transmitter that cannot start or whose device did not come back is logged and shown in the
status (``transmitter.state``: ``failed``, with ``error``); the daemon keeps running.
:meth:`LoopbackTransmitter.close` stops the loop, which silences the radio first.

RF caution: this transmits from the radio the daemon receives with. Cable TX to RX through
enough fixed attenuation to keep the receiver within its input rating, operate only within your
licence or the band's licence-exempt rules (frequency, power, emission mask), keep clear of
antennas for RF exposure; local regulations and licensed practice take precedence.
"""

from __future__ import annotations

import logging
import threading
import time
from typing import Any, Callable

from brimline.daemon.errors import BrimlineError
from brimline.daemon.net.curve import follower_keys
from brimline.daemon.runtime.assemble import build_tx, open_loopback_sink
from brimline.daemon.runtime.config import Config
from brimline.daemon.runtime.transmitter import TX_STATUS_TYPE, TxLoop

__all__ = ["LoopbackTransmitter"]

log = logging.getLogger("brimline.tx")


class LoopbackTransmitter:
    """``brimline tx``'s loop on the daemon's radio, on a thread of its own.

    Parameters
    ----------
    config : Config
        The daemon's validated config (``driver.radio``, ``tx``, ``publish``, ``loading``,
        ``emulated``).
    plan : LinkPlan
        The daemon's tone plan.
    endpoints : dict
        The daemon's bound ``maps``, ``snapshots`` and ``acks`` endpoints.
    context : zmq.Context or None
        Context for the follower's sockets.
    clock : callable
        Monotonic seconds (the loop's and its follower's).
    """

    def __init__(self, config: Config, plan, endpoints: dict[str, str], *, context=None,
                 clock: Callable[[], float] = time.monotonic) -> None:
        self.config = config
        self.plan = plan
        self.endpoints = dict(endpoints)
        self.context = context
        self._clock = clock
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        #: The loop once built on the thread (None before, or when it could not start).
        self.loop: TxLoop | None = None
        #: The one-line reason the transmitter stopped by itself, or None.
        self.error: str | None = None
        self._last: dict[str, Any] | None = None

    def start(self) -> None:
        """Start the thread (it opens the device and the follower there)."""
        if self._thread is not None:
            return
        self._thread = threading.Thread(target=self._run, name="brimline-loopback-tx",
                                        daemon=True)
        self._thread.start()

    def _run(self) -> None:
        try:
            sink = open_loopback_sink(self.config, self.plan)
            try:
                loop = build_tx(self.config, self.plan, sink, status=False,
                                context=self.context, clock=self._clock,
                                map_endpoint=self.endpoints["maps"],
                                snapshot_endpoint=self.endpoints["snapshots"],
                                ack_endpoint=self.endpoints["acks"],
                                **follower_keys(self.config.publish))
            except BaseException:
                sink.close()  # silences first
                raise
            self.loop = loop
            with loop:  # closing silences the radio before anything else
                loop.run(self._stop, realtime=True)
                self._last = loop.status(self._clock())
        except BrimlineError as exc:
            self.error = str(exc)
            log.error("loopback transmitter stopped: %s", exc)
        except Exception as exc:  # noqa: BLE001 - a bug here must not take the daemon down
            self.error = f"{type(exc).__name__}: {exc}"
            log.exception("loopback transmitter failed")
        finally:
            if self.loop is not None:
                self._last = self.loop.status(self._clock())

    def status(self) -> dict[str, Any]:
        """The transmitter's status dict (``type: tx_status``), with ``error`` when it stopped
        by itself; ``state`` is ``starting`` before the loop exists and ``failed`` after an
        error."""
        loop = self.loop
        if loop is not None and self.error is None and (self._thread is not None
                                                        and self._thread.is_alive()):
            st = loop.status(self._clock())
        elif self._last is not None:
            st = dict(self._last)
        else:
            st = {"type": TX_STATUS_TYPE, "time_s": float(self._clock()), "state": "starting"}
        if self.error is not None:
            st["state"] = "failed"
        st["error"] = self.error
        return st

    def close(self, timeout_s: float = 10.0) -> None:
        """Stop the loop (it silences the radio as it closes) and join the thread."""
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout_s)
            if self._thread.is_alive():
                log.warning("loopback transmitter did not stop within %.1f s", timeout_s)

    def __enter__(self):
        return self

    def __exit__(self, *exc) -> None:
        self.close()
