"""The outer margin loop: frame outcomes in, an SNR offset on the loading margin out.

The inner loop (estimator, change control, loader) loads bits for a target error rate through
the SNR gap, and the gap is a model: a coding gain, an implementation loss or an estimator bias
that the model misses leaves the real frame error rate away from the target. The outer loop
closes that gap with what the receiver actually saw. :class:`OuterLoop` keeps one number, the
**offset** in dB, which the link controller adds to the gap it loads with (equivalently,
subtracts from every tone's effective SNR):

* on each errored frame the offset rises by ``step_up_db``;
* on each good frame it falls by ``step_down_db = step_up_db * T / (1 - T)``,
  with ``T = target_fer``;
* it stays within ``[min_offset_db, max_offset_db]``.

Why this ratio: in the steady state the expected change per frame is zero,
``FER * step_up - (1 - FER) * step_down = 0``, so ``FER = step_down / (step_up + step_down)``,
which is ``T`` exactly when ``step_down / step_up = T / (1 - T)`` (1/9 for T = 10 %). This is
the outer-loop link adaptation of Nakamura, Awad and Vadgama (WPMC 2002), analysed by
Blanquez-Casado et al. (EURASIP J. Wireless Commun. Netw. 2016:20). The fixed point holds for
any monotone dependence of the error rate on the offset; the step size sets only how fast the
loop moves and how much the offset wanders around the fixed point (``step_up_db`` per error).

Off without feedback: before the first outcome the offset is 0 dB. When no outcome has been
recorded for ``quiet_s`` the loop goes **off**: the offset returns to 0 dB at once and holds
there, and the measured window is cleared, until outcomes arrive again. An offset learned on an
old channel is not evidence about the present one; the configured margin is the operator's
baseline. (A slow decay would keep a correction of unknown age in force for a while; a hold
would keep it for ever.)

Outcomes must come with increasing frame numbers: a frame number not above the last one
recorded (a duplicate, a reordered or replayed report) is dropped and counted as ``repeated``.
After the loop went off, numbering starts afresh (a restarted receiver counts from 0 again).

The measured frame error rate shown in status is the share of errored frames among the last
``window_frames`` outcomes (NaN before any); it is for operators and does not steer the loop.
"""

from __future__ import annotations

import collections
import math
from types import MappingProxyType
from typing import Any, Mapping

from brimline.daemon.limits import FINITE, POSITIVE, at_least, between, check_values

__all__ = ["OuterLoop", "OUTER_LIMITS", "check_outer_settings", "step_down_ratio"]

#: The limit of each keyword argument of :class:`OuterLoop`, checked by the constructor and by
#: the ``outer:`` config section alike; rules between keys are :func:`check_outer_settings`'s.
OUTER_LIMITS = MappingProxyType({
    "target_fer": between(0, 1, low_open=True, high_open=True),
    "step_up_db": POSITIVE,
    "min_offset_db": FINITE,
    "max_offset_db": FINITE,
    "window_frames": at_least(1),
    "quiet_s": POSITIVE,
})


def check_outer_settings(settings: Mapping[str, Any], *, prefix: str = "") -> None:
    """Check outer-loop settings: each against :data:`OUTER_LIMITS`, then their order.

    Parameters
    ----------
    settings : mapping
        Keyword arguments of :class:`OuterLoop`.
    prefix : str
        Put before each key in messages (``"outer."``).

    Raises
    ------
    ValueError
        ``outer.target_fer=1.0 must be in (0, 1)``; ``min_offset_db`` above 0 or
        ``max_offset_db`` below 0 (the loop starts and rests at 0 dB).
    """
    check_values(settings, OUTER_LIMITS, prefix=prefix)
    low, high = settings.get("min_offset_db"), settings.get("max_offset_db")
    if low is not None and low > 0:
        raise ValueError(f"{prefix}min_offset_db={low} must be <= 0 (the loop starts at 0 dB)")
    if high is not None and high < 0:
        raise ValueError(f"{prefix}max_offset_db={high} must be >= 0 (the loop starts at 0 dB)")


def step_down_ratio(target_fer: float) -> float:
    """Down step over up step that makes the frame error rate settle at ``target_fer``.

    Parameters
    ----------
    target_fer : float
        Target frame error rate T, in (0, 1).

    Returns
    -------
    float
        ``T / (1 - T)``.

    Notes
    -----
    Outer-loop link adaptation (Nakamura, Awad and Vadgama, WPMC 2002; Blanquez-Casado et
    al., EURASIP JWCN 2016:20): zero mean drift per frame needs
    ``T * step_up = (1 - T) * step_down``.

    Examples
    --------
    >>> round(step_down_ratio(0.1), 6)   # 1/9
    0.111111
    """
    between(0, 1, low_open=True, high_open=True).check("target_fer", target_fer)
    return float(target_fer) / (1.0 - float(target_fer))


class OuterLoop:
    """SNR offset steered by frame outcomes so that the frame error rate settles at a target.

    Parameters
    ----------
    target_fer : float
        Frame error rate the loop steers to, in (0, 1).
    step_up_db : float
        Offset added on each errored frame, dB; the down step follows from the target
        (:func:`step_down_ratio`).
    min_offset_db, max_offset_db : float
        Bounds of the offset, dB (``min <= 0 <= max``).
    window_frames : int
        Outcomes over which the measured frame error rate is shown.
    quiet_s : float
        Without an outcome for this long the loop is off: offset 0 dB, window cleared, s.

    Notes
    -----
    The keyword arguments are exactly the keys of the ``outer:`` config section; their
    defaults here are the only ones. Time comes in as ``now_s`` (the daemon's clock when the
    outcome arrived); nothing here reads a clock. Deterministic: the same calls give the same
    offsets.
    """

    def __init__(self, *, target_fer: float = 0.1, step_up_db: float = 0.5,
                 min_offset_db: float = -3.0, max_offset_db: float = 6.0,
                 window_frames: int = 500, quiet_s: float = 2.0) -> None:
        settings = dict(locals())
        del settings["self"]
        check_outer_settings(settings, prefix="outer.")
        self.target_fer = float(target_fer)
        self.step_up_db = float(step_up_db)
        self.step_down_db = self.step_up_db * step_down_ratio(self.target_fer)
        self.min_offset_db = float(min_offset_db)
        self.max_offset_db = float(max_offset_db)
        self.window_frames = int(window_frames)
        self.quiet_s = float(quiet_s)
        self._offset_db = 0.0
        self._window: collections.deque[bool] = collections.deque(maxlen=self.window_frames)
        self._errored_in_window = 0
        self._last_frame = -1
        self._last_s: float | None = None
        self._counters = dict.fromkeys(("outcomes", "errored", "repeated", "went_off"), 0)

    @property
    def counters(self) -> dict[str, int]:
        """``outcomes`` and ``errored`` recorded, ``repeated`` (dropped: frame number not
        increasing), ``went_off`` (times the loop fell silent for ``quiet_s``)."""
        return dict(self._counters)

    def active(self, now_s: float) -> bool:
        """Whether an outcome was recorded within ``quiet_s`` before ``now_s``."""
        return self._last_s is not None and float(now_s) - self._last_s < self.quiet_s

    def offset_db(self, now_s: float) -> float:
        """The offset to add to the loading gap at ``now_s``, dB (0 while the loop is off)."""
        self._check_quiet(float(now_s))
        return self._offset_db

    def record(self, errored: bool, frame: int, now_s: float) -> bool:
        """Take one frame outcome.

        Parameters
        ----------
        errored : bool
            The frame failed its payload check.
        frame : int
            The frame's number; must be above the last recorded one.
        now_s : float
            The caller's clock when the outcome arrived, s.

        Returns
        -------
        bool
            False when the outcome was dropped as ``repeated``.
        """
        now_s = float(now_s)
        self._check_quiet(now_s)
        if frame <= self._last_frame:
            self._counters["repeated"] += 1
            return False
        self._last_frame = int(frame)
        self._last_s = now_s
        errored = bool(errored)
        step = self.step_up_db if errored else -self.step_down_db
        self._offset_db = min(self.max_offset_db,
                              max(self.min_offset_db, self._offset_db + step))
        if len(self._window) == self.window_frames:
            self._errored_in_window -= self._window[0]
        self._window.append(errored)
        self._errored_in_window += errored
        self._counters["outcomes"] += 1
        self._counters["errored"] += errored
        return True

    def measured_fer(self) -> float:
        """Errored share of the last ``window_frames`` outcomes (NaN before any)."""
        return self._errored_in_window / len(self._window) if self._window else math.nan

    def status(self, now_s: float) -> dict[str, Any]:
        """What an operator reads: ``active``, ``offset_db``, ``fer`` (over ``window``
        outcomes), ``target_fer``, and the counters."""
        offset = self.offset_db(now_s)
        return {"active": self.active(now_s), "offset_db": offset,
                "fer": self.measured_fer(), "window": len(self._window),
                "target_fer": self.target_fer, **self._counters}

    def _check_quiet(self, now_s: float) -> None:
        if self._last_s is not None and now_s - self._last_s >= self.quiet_s:
            self._offset_db = 0.0
            self._window.clear()
            self._errored_in_window = 0
            self._last_frame = -1
            self._last_s = None
            self._counters["went_off"] += 1
