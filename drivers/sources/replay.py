"""Replay of a recorded estimate log as a driver.

The log is the protocol's crash-safe recording (:mod:`brimline.daemon.wire.recording`): the named
file and its rotated continuations (``NAME.0001.EXT``, ...), played in order as one stream. Only
its estimate records are replayed, with their recorded ``time_s`` and ``frame``. Since the service
feeds the estimates' own time to the core for this source, a replay makes the same decisions
however fast it runs: replaying a file twice gives the same maps.

A torn tail (the recorder was killed mid-record; counted per file, and logged by the reader) or a
damaged record is counted under ``counters["torn"]`` / ``counters["damaged"]``, never raised. A
damaged record ends the pass (what came before it was replayed).
"""

from __future__ import annotations

import dataclasses
import time
from pathlib import Path
from types import MappingProxyType
from typing import Callable, Iterator

from brimline.daemon.errors import RecordingError, SourceError
from brimline.daemon.limits import POSITIVE, check_values
from brimline.daemon.records import Estimate
from brimline.daemon.wire.codec import TOPIC_ESTIMATE
from brimline.daemon.wire.recording import RecordSetReader
from brimline.drivers.sources.base import Driver

__all__ = ["ReplayDriver", "REPLAY_LIMITS"]

#: Limits of :class:`ReplayDriver`'s numeric keyword arguments, checked by the constructor and by
#: the ``driver.replay:`` config section alike.
REPLAY_LIMITS = MappingProxyType({"speed": POSITIVE})


class ReplayDriver(Driver):
    """Yield the estimates of a recording.

    Parameters
    ----------
    path : str or Path
        Estimate recording written by :class:`brimline.daemon.wire.recording.RecordWriter` (its
        first file; rotated continuations follow it).
    realtime : bool
        Pace the frames by their recorded ``time_s`` (divided by ``speed``); otherwise as fast as
        the consumer takes them.
    speed : float
        Pacing factor when ``realtime`` (2.0 plays twice as fast).
    loop : bool
        Start again at the end. Later passes shift ``time_s`` and ``frame`` so both keep
        increasing (by the recording's span plus one frame interval per pass).
    sleep : callable, optional
        ``sleep(seconds)`` used for pacing (tests inject a fake); by default waits on the
        driver's close event, so ``close()`` interrupts a pause.

    Raises
    ------
    SourceError
        When the file is missing or is not a recording, or a part of the set is missing.
    """

    name = "replay"

    def __init__(self, *, path, realtime: bool = False, speed: float = 1.0, loop: bool = False,
                 sleep: Callable[[float], None] | None = None,
                 clock: Callable[[], float] = time.monotonic) -> None:
        super().__init__()
        self.path = Path(path)
        if not self.path.is_file():
            raise SourceError(f"replay: {self.path}: no such recording")
        check_values(dict(speed=speed), REPLAY_LIMITS, prefix="driver.replay.", error=SourceError)
        self.realtime = bool(realtime)
        self.speed = float(speed)
        self.loop = bool(loop)
        self._sleep = sleep if sleep is not None else self._closed.wait
        self._clock = clock
        # Open once now so a file that is not a recording is a SourceError at start.
        try:
            with _open_reader(self.path):
                pass
        except RecordingError as exc:
            raise SourceError(f"replay: {exc}") from exc

    def _read_pass(self) -> Iterator[Estimate]:
        """One pass over the estimates of every file of the set; damage is counted, not raised."""
        reader = None
        try:
            reader = _open_reader(self.path)
            for _topic, record in reader:
                if isinstance(record, Estimate):
                    yield record
                else:
                    self.counters["not_estimates"] += 1
        except RecordingError:
            # Damage in the middle of a file: what came before was replayed; stop this pass.
            self.counters["damaged"] += 1
        finally:
            if reader is not None:
                if reader.torn:
                    self.counters["torn"] += reader.torn
                reader.close()

    def _frames(self) -> Iterator[Estimate]:
        t_offset, f_offset = 0.0, 0
        start_wall = None
        t_first = None
        while not self.closed:
            first = last = None
            step_s, step_f = 0.0, 1
            n = 0
            for est in self._read_pass():
                if self.closed:
                    return
                if first is None:
                    first = est
                elif n == 1:
                    step_s, step_f = est.time_s - first.time_s, max(1, est.frame - first.frame)
                n += 1
                last = est
                if t_offset or f_offset:
                    est = _shifted(est, t_offset, f_offset)
                if self.realtime:
                    if start_wall is None:
                        start_wall, t_first = self._clock(), est.time_s
                    delay = (est.time_s - t_first) / self.speed - (self._clock() - start_wall)
                    if delay > 0:
                        self._sleep(delay)
                        if self.closed:
                            return
                self.counters["frames"] += 1
                yield est
            if not self.loop or first is None:
                return
            t_offset += last.time_s - first.time_s + step_s
            f_offset += last.frame - first.frame + step_f
            self.counters["passes"] += 1


def _shifted(est: Estimate, t_offset: float, f_offset: int) -> Estimate:
    return dataclasses.replace(est, time_s=est.time_s + t_offset, frame=est.frame + f_offset)


def _open_reader(path: Path) -> RecordSetReader:
    return RecordSetReader(path, topics=[TOPIC_ESTIMATE])
