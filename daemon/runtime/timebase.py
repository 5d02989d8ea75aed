"""Which time the link controller is given: the service's clock policy.

The controller gets ``now_s`` as an argument. Which clock it is, is a per-source choice
(``service.clock``; ``auto`` picks ``monotonic`` for a live source, else ``source``):

* ``source`` (sim, replay, recorded IQ): ``now_s`` is the estimate's own ``time_s``. Replay and
  the simulator therefore make the same decisions however fast they run, and replaying a file
  twice gives the same maps byte for byte. Between estimates of a live or paced source (a
  silent source), the time is the last estimate's extended by the monotonic time elapsed since
  it arrived, only to notice staleness; a source read as fast as possible (``realtime`` false:
  replay, recorded IQ, the simulator in fast mode) has no wall-clock staleness at all (its gaps
  show in its own times), so a busy machine cannot change its maps. In lockstep
  (:class:`~brimline.daemon.runtime.handoff.LockstepFeed`) a frame without an estimate is a
  tick at its own simulated time, and the wall clock never reaches the controller.
* ``monotonic`` (live sources: radio, pushed estimates, an IQ stream): ``now_s`` is the
  daemon's monotonic clock at arrival.

Heartbeats and the status period are I/O pacing and always run on the monotonic clock.
"""

from __future__ import annotations

from typing import Callable

from brimline.daemon.records import Estimate

__all__ = ["Timebase"]


class Timebase:
    """The controller's time for one run (see the module notes).

    Parameters
    ----------
    mode : {"source", "monotonic"}
        The clock policy.
    clock : callable
        The service's monotonic clock, s.
    """

    def __init__(self, mode: str, clock: Callable[[], float]) -> None:
        if mode not in ("source", "monotonic"):
            raise ValueError(f"service.clock={mode!r} must be source or monotonic")
        self.mode = mode
        self._clock = clock
        self._started_wall = 0.0
        self._last_s: float | None = None  # controller time and monotonic arrival of the
        self._last_wall = 0.0  # newest estimate (staleness while the source is silent)

    def start(self) -> None:
        """Mark the start of the run (time before the first estimate counts from here)."""
        self._started_wall = self._clock()

    def of(self, estimate: Estimate) -> float:
        """The controller's time for ``estimate`` as it arrives, s."""
        return estimate.time_s if self.mode == "source" else self._clock()

    def arrived(self, now_s: float) -> None:
        """Note that an estimate was given to the controller at ``now_s``."""
        self._last_s, self._last_wall = now_s, self._clock()

    def now(self) -> float:
        """The controller's time now, between estimates, s."""
        wall = self._clock()
        if self.mode == "monotonic":
            return wall
        if self._last_s is None:
            return wall - self._started_wall
        return self._last_s + (wall - self._last_wall)

    def watches_silence(self, driver) -> bool:
        """Whether a silent ``driver`` is noticed on the wall clock: not for a source-clock
        source that says it is not paced (``realtime`` false), whose time is only what its
        estimates say, so that a pause of the machine is not read as a silent link."""
        return not (self.mode == "source" and getattr(driver, "realtime", True) is False)
