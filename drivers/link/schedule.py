"""The transmitter's two rules beside the frame builder: which map is in force at a frame, and
how much power any map may put out.

* :class:`MapSchedule`: a map names the frame from which it is in force (``effective_frame``,
  counted in the transmitter's own frame counter). Maps wait in the schedule until that frame;
  the map in force at frame ``k`` is the newest-sequence map whose ``effective_frame <= k``. A
  map that arrives after its frame has passed is in force from the next frame built (counted as
  ``late``), never applied to a frame already sent.
* :class:`PowerBound`: the configured bound on transmit power, in the map's own units (linear
  power per data tone relative to nominal). No map can push the output above it: a tone above
  ``max_tone_db`` is cut to it, and a map whose total exceeds ``max_total_db`` is scaled down
  as a whole (both counted). The digital backoff and the hardware attenuation that turn
  "nominal" into an absolute level live in the sinks; this rule is what keeps any map within
  them.

Both are pure: no clock, no sockets; tests drive them frame by frame.
"""

from __future__ import annotations

import collections
import math
from dataclasses import dataclass

import numpy as np

from brimline.daemon.records import LoadMap

__all__ = ["MapSchedule", "PowerBound", "BoundedPower"]

_MAX_PENDING = 64  # maps waiting for their frame; more means the publisher floods us


class MapSchedule:
    """The transmitter's rule for when a map is in force: from its effective frame on.

    ``brimline tx``, the lockstep simulation and the closed-loop baselines all use it, so a map
    applies at the frame it names whatever the wall clock did. Called as ``schedule(frame)`` it
    is a map provider for the simulator.

    Attributes
    ----------
    current : LoadMap or None
        The map in force at the last frame asked for (None: the default map).
    counters : collections.Counter
        ``scheduled``, ``late`` (effective frame already passed when scheduled),
        ``superseded`` (replaced by a newer map before its frame), ``pending_dropped``.
    """

    def __init__(self) -> None:
        self.current: LoadMap | None = None
        self._pending: list[tuple[int, LoadMap]] = []  # (first frame in force, map)
        self.counters: collections.Counter[str] = collections.Counter()

    @property
    def pending(self) -> tuple[LoadMap, ...]:
        """Maps scheduled for a later frame, in the order they take effect."""
        return tuple(m for _start, m in self._pending)

    def schedule(self, load_map: LoadMap, next_frame: int | None = None, *,
                 from_frame: int | None = None) -> None:
        """Queue ``load_map`` from its effective frame (or from ``from_frame``: 0 for a map
        restored from an earlier run, whose frame numbers mean nothing now). ``next_frame``
        is the counter of the next frame to be built, when known (to count late maps)."""
        start = load_map.effective_frame if from_frame is None else int(from_frame)
        self.counters["scheduled"] += 1
        if next_frame is not None and start < next_frame:
            self.counters["late"] += 1
        # A newer map taking effect no later than a pending one replaces it.
        kept = [(s, m) for s, m in self._pending if s < start]
        self.counters["superseded"] += len(self._pending) - len(kept)
        kept.append((start, load_map))
        if len(kept) > _MAX_PENDING:
            self.counters["pending_dropped"] += len(kept) - _MAX_PENDING
            kept = kept[-_MAX_PENDING:]
        self._pending = kept

    def at(self, frame: int) -> tuple[LoadMap | None, bool]:
        """The map in force at ``frame`` and whether it changed at this frame.

        Frames must be asked for in increasing order.
        """
        changed = False
        while self._pending and self._pending[0][0] <= frame:
            self.current = self._pending.pop(0)[1]
            changed = True
        return self.current, changed

    def __call__(self, frame: int) -> LoadMap | None:
        """The map in force at ``frame`` (the simulator's map-provider call)."""
        return self.at(frame)[0]

    def clear(self) -> None:
        """Forget the pending maps and the map in force (back to the default map)."""
        self._pending.clear()
        self.current = None


@dataclass(frozen=True)
class BoundedPower:
    """Power per data tone after the bound, and what the bound did.

    Attributes
    ----------
    power_lin : ndarray of float64
        Linear power per data tone relative to nominal, within the bound.
    tones_cut : int
        Tones cut down to ``max_tone_db``.
    scaled : bool
        True when the whole map was scaled down to ``max_total_db``.
    """

    power_lin: np.ndarray
    tones_cut: int
    scaled: bool

    @property
    def clipped(self) -> bool:
        """True when the bound changed the map's power at all."""
        return self.tones_cut > 0 or self.scaled


class PowerBound:
    """The transmit power bound, applied to every map's per-tone power.

    Parameters
    ----------
    n_tones : int
        Data tones of the plan (the total bound is ``n_tones`` at ``max_total_db``).
    max_tone_db : float
        Largest power of one data tone relative to nominal, dB.
    max_total_db : float
        Largest total power relative to every data tone at nominal, dB.
    """

    def __init__(self, n_tones: int, *, max_tone_db: float = 0.0,
                 max_total_db: float = 0.0) -> None:
        for name, value in (("max_tone_db", max_tone_db), ("max_total_db", max_total_db)):
            if not math.isfinite(value):
                raise ValueError(f"tx.{name}={value} must be finite")
        self.n_tones = int(n_tones)
        self.max_tone_db = float(max_tone_db)
        self.max_total_db = float(max_total_db)
        self.tone_lin = 10.0 ** (self.max_tone_db / 10.0)
        self.total_lin = self.n_tones * 10.0 ** (self.max_total_db / 10.0)

    def __call__(self, power_lin: np.ndarray) -> BoundedPower:
        """Bound one map's power (NaN and negative values count as off)."""
        p = np.asarray(power_lin, dtype=np.float64)
        p = np.where(np.isfinite(p) & (p > 0), p, 0.0)
        over = p > self.tone_lin
        p = np.where(over, self.tone_lin, p)
        total = float(p.sum())
        scaled = total > self.total_lin
        if scaled:
            p = p * (self.total_lin / total)
        return BoundedPower(power_lin=p, tones_cut=int(over.sum()), scaled=bool(scaled))
