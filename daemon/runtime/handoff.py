"""The driver thread: a source's estimates handed to the main thread over an inproc PAIR socket.

:class:`DriverThread` iterates ``driver.frames()`` on a thread of its own, encodes each
:class:`~brimline.daemon.records.Estimate` with the codec and sends it over an ``inproc`` PAIR
socket whose receiving end (:attr:`DriverThread.rx`) belongs to the main thread. The sending
socket is created, used and closed on the driver thread only (ZeroMQ sockets never cross
threads). While the main thread is busy the driver thread blocks (replay and the simulator must
not lose frames) but wakes every 0.1 s to notice ``driver.close()``. When the source ends or
raises, it sends one control message (:func:`control_message` reads it) and closes its socket.

:class:`LockstepFeed` is the other way to feed the main thread, for the simulator in fast mode:
no thread at all. The main thread steps the simulator frame by frame (``SimDriver.step``) and
gives each estimate to the controller before the next frame is sent; a frame without an
estimate is a tick at its own simulated time, so the wall clock never reaches the controller.
The maps reach the simulated transmitter through a
:class:`~brimline.drivers.link.schedule.MapSchedule` (a map is in force from its effective frame)
and are still published on the sockets for followers and ``watch``. With the source clock and
an epoch derived from the config (see :mod:`brimline.daemon.runtime.outlets`), a seed gives the
same maps byte for byte on every run.
"""

from __future__ import annotations

import json
import logging
import threading
from typing import Callable

import zmq

from brimline.daemon.errors import BrimlineError
from brimline.daemon.wire import codec

__all__ = ["DriverThread", "LockstepFeed", "control_message"]

log = logging.getLogger("brimline.service")

_CONTROL = b"_driver"  # topic of driver-thread control messages on the inproc socket


def control_message(frames) -> dict | None:
    """The driver thread's last message (``{"state": "ended" | "failed", "error"}``) when
    ``frames`` is one, else None (an estimate)."""
    if frames and bytes(getattr(frames[0], "buffer", frames[0])) == _CONTROL:
        return json.loads(bytes(getattr(frames[1], "buffer", frames[1])))
    return None


class DriverThread:
    """Run a driver on its own thread and hand its estimates to the thread that made this.

    Parameters
    ----------
    context : zmq.Context
        Context of both ends of the inproc pair.
    driver : Driver
        The estimate source (``frames()``, ``close()``, ``closed``).
    on_exit : callable, optional
        Called on the driver thread as it leaves (closes what the driver's helpers opened there,
        e.g. the simulated transmitter's follower).
    """

    def __init__(self, context: zmq.Context, driver, *,
                 on_exit: Callable[[], None] | None = None) -> None:
        self.driver = driver
        self._context = context
        self._on_exit = on_exit
        self._addr = f"inproc://brimline-estimates-{id(self):x}"
        self.rx = context.socket(zmq.PAIR)
        self.rx.setsockopt(zmq.LINGER, 0)
        self.rx.setsockopt(zmq.RCVHWM, 64)
        self.rx.bind(self._addr)
        self._thread = threading.Thread(target=self._main, name="brimline-driver", daemon=True)

    def start(self) -> None:
        """Start the driver thread."""
        self._thread.start()

    @property
    def alive(self) -> bool:
        """Whether the driver thread is running."""
        return self._thread.is_alive()

    def pending(self) -> bool:
        """Whether a message waits on the receiving end."""
        return bool(self.rx.poll(0, zmq.POLLIN))

    def receive(self):
        """The next waiting message (a list of frames), or None when none waits."""
        try:
            return self.rx.recv_multipart(zmq.NOBLOCK, copy=False)
        except zmq.Again:
            return None

    def join(self, timeout_s: float) -> None:
        """Wait up to ``timeout_s`` for the driver thread to leave (after ``driver.close()``)."""
        if self._thread.ident is not None:
            self._thread.join(timeout_s)

    def close(self) -> None:
        """Close the receiving end (after :meth:`join`). Idempotent."""
        self.rx.close(linger=0)

    def _main(self) -> None:
        tx = self._context.socket(zmq.PAIR)
        tx.setsockopt(zmq.LINGER, 0)
        tx.setsockopt(zmq.SNDHWM, 64)
        state, error = "ended", None
        try:
            tx.connect(self._addr)
            for estimate in self.driver.frames():
                frames = codec.encode(codec.TOPIC_ESTIMATE, estimate)
                while not tx.poll(100, zmq.POLLOUT):
                    if self.driver.closed:
                        return
                tx.send_multipart(frames, copy=False)
                if self.driver.closed:
                    break
        except BrimlineError as exc:
            state, error = "failed", str(exc)
        except Exception as exc:  # noqa: BLE001 - any driver bug is reported, not a crash
            state, error = "failed", f"{type(exc).__name__}: {exc}"
            log.exception("driver %s failed", getattr(self.driver, "name", "driver"))
        finally:
            try:
                msg = json.dumps({"state": state, "error": error}).encode()
                if tx.poll(500, zmq.POLLOUT):
                    tx.send_multipart([_CONTROL, msg])
            finally:
                if self._on_exit is not None:
                    self._on_exit()
                tx.close(linger=0)


class LockstepFeed:
    """Step a simulator on the calling thread, one frame at a time (see the module notes).

    Parameters
    ----------
    driver : SimDriver
        A simulator with ``step()``, ``next_frame``, ``max_frames``, ``start_s`` and
        ``frame_time_s(frame)``.
    clock_every : int
        Frames simulated between two reads of the clock.
    """

    def __init__(self, driver, *, clock_every: int = 4) -> None:
        self.driver = driver
        self._clock_every = int(clock_every)

    def run(self, deadline: float, clock: Callable[[], float], *,
            process: Callable, tick: Callable[[float], None],
            keep_going: Callable[[float], bool] | None = None,
            ) -> tuple[str, str | None] | None:
        """Simulate frames until ``deadline`` (on ``clock``) or the source ends.

        Each frame's estimate goes to ``process(estimate)`` before the next frame is sent; a
        frame without one calls ``tick(time_s)`` with its simulated time. ``keep_going``, when
        given, is asked with the next frame's simulated time before that frame is simulated;
        False stops here (the caller's own end in link time, such as ``--duration``).

        Returns
        -------
        tuple or None
            ``("ended", None)`` or ``("failed", error)`` when the source stopped, else None.
        """
        drv = self.driver
        handled = 0
        while True:
            if handled and handled % self._clock_every == 0 and clock() >= deadline:
                return None
            handled += 1
            if drv.closed or (drv.max_frames is not None and drv.next_frame >= drv.max_frames):
                log.info("source %s ended", drv.name)
                return "ended", None
            frame = drv.next_frame
            if keep_going is not None and not keep_going(drv.start_s + drv.frame_time_s(frame)):
                return None
            try:
                estimate = drv.step()
            except BrimlineError as exc:
                log.error("source %s stopped: %s", drv.name, exc)
                return "failed", str(exc)
            if estimate is None:
                tick(drv.start_s + drv.frame_time_s(frame))
            else:
                process(estimate)
