"""The receiver's sample clock offset, measured from where frames start and what they are numbered.

The transmitter sends one frame per slot of a fixed number of samples at its own sample clock
and numbers each frame in its header (:mod:`brimline.drivers.link.frame`). At the receiver a
frame numbered ``k`` starts at sample ``p_k``; with the receiver's sample clock off by ``e``
(parts per million) against the transmitter's, one slot of ``L`` transmitter samples lasts
``L (1 + e 1e-6)`` receiver samples, so

    p_k = p_0 + (1 + e 1e-6) L k + jitter.

The offset is therefore the least-squares slope of the start positions against ``k L``, less 1,
times 1e6 (:func:`clock_offset_ppm`; robustly: over the points near a Theil-Sen line).
:class:`ClockFit` keeps that fit over a sliding window of recent frames of one contiguous
stretch of samples:

* a gap in the counters (frames lost to noise) needs nothing: the counters say how many slots
  passed;
* a stretch ends where samples were lost (a receive overflow, a dropped buffer, a reconnect):
  the caller calls :meth:`ClockFit.restart`; a loss the caller cannot see shows as a start that
  is off the fitted line by more than ``tolerance_samples`` (or, before the fit, off the
  nominal slot by more than :data:`MAX_OFFSET_PPM` allows), and restarts the fit at that frame;
  so does a counter that does not advance (a repeated frame) or goes back;
* a slot length that does not match the transmitter's (the receiver was told the wrong frame
  rate) makes every frame look like a loss, so no offset is shown rather than a wrong one.

Only the slot length known from the transmitter's frame rate measures anything: a slot length
taken from the received spacing itself would contain the very offset being measured (the slope
would be 1 by construction). Without it no offset is given.

Notes
-----
Ordinary least squares of a straight line (e.g. Press et al., *Numerical Recipes*, 3rd ed.,
section 15.2, "Fitting Data to a Straight Line", from memory), over the inliers of a Theil-Sen
line (references at :func:`clock_offset_ppm`); the restart rule is a plain residual gate,
common practice rather than a published estimator.
"""

from __future__ import annotations

import collections
import functools
import math

import numpy as np

__all__ = ["clock_offset_ppm", "ClockFit", "MAX_OFFSET_PPM"]

#: Largest offset taken as a sample clock error rather than a wrong slot length or lost samples,
#: ppm (crystal oscillators of radios are within some tens of ppm; the emulated knob goes to
#: 1000).
MAX_OFFSET_PPM = 2000.0


def clock_offset_ppm(positions: np.ndarray, counters: np.ndarray, slot_samples: float, *,
                     inlier_samples: float | None = None) -> float | None:
    """Sample clock offset from frame start positions and their (unwrapped) frame counters.

    Parameters
    ----------
    positions : array_like, shape (N,)
        Start of each frame in the received sample stream, samples (one contiguous stretch).
    counters : array_like, shape (N,)
        The frames' unwrapped header counters (slots since any fixed origin).
    slot_samples : float
        Samples per frame slot at the transmitter's sample clock.
    inlier_samples : float or None
        When given, the fit is robust: a Theil-Sen line first (the median of the slopes of
        all pairs), then least squares over the points within ``inlier_samples`` of it, so a
        frame found a few samples off (the first one of a stream, where the synchroniser
        cannot look back) does not tilt the line. None: least squares over all points.

    Returns
    -------
    float or None
        ``(slope - 1) * 1e6`` of the least-squares line of ``positions`` against
        ``counters * slot_samples``: positive when the receiver's clock runs fast. None with
        fewer than two distinct counters (among the inliers), a non-positive or non-finite
        slot, or non-finite input.

    Notes
    -----
    Theil-Sen: H. Theil, "A rank-invariant method of linear and polynomial regression
    analysis", 1950; P. K. Sen, "Estimates of the regression coefficient based on Kendall's
    tau", JASA 63, 1968.

    Examples
    --------
    >>> k = np.arange(10)
    >>> round(clock_offset_ppm(5 + k * 1000.05, k, 1000.0), 3)
    50.0
    """
    p = np.asarray(positions, dtype=np.float64).ravel()
    k = np.asarray(counters, dtype=np.float64).ravel()
    slot = float(slot_samples)
    if p.size != k.size or p.size < 2 or not (math.isfinite(slot) and slot > 0):
        return None
    if not (np.isfinite(p).all() and np.isfinite(k).all()):
        return None
    if inlier_samples is not None:
        i, j = _pairs(k.size)
        dk = k[j] - k[i]
        pair = dk != 0
        if not pair.any():
            return None
        theil = float(np.median((p[j] - p[i])[pair] / dk[pair]))  # samples per counter step
        offset = float(np.median(p - theil * k))
        keep = np.abs(p - offset - theil * k) <= float(inlier_samples)
        p, k = p[keep], k[keep]
        if p.size < 2:
            return None
    x = (k - k.mean()) * slot
    sxx = float(x @ x)
    if sxx <= 0.0:
        return None
    slope = float(x @ (p - p.mean())) / sxx
    return (slope - 1.0) * 1e6


@functools.lru_cache(maxsize=8)
def _pairs(n: int) -> tuple[np.ndarray, np.ndarray]:
    """Index pairs ``i < j`` of ``n`` points (read-only, cached: the window size repeats)."""
    i, j = np.triu_indices(n, 1)
    i.setflags(write=False)
    j.setflags(write=False)
    return i, j


class ClockFit:
    """The sample clock offset over a sliding window of frames of one contiguous stretch.

    Parameters
    ----------
    slot_samples : float
        Samples per frame slot at the transmitter's sample clock.
    window : int
        Most recent frames fitted.
    min_frames : int
        Frames in the stretch before an offset is given.
    tolerance_samples : float
        Largest distance of a frame start from the fitted line (or, before ``min_frames``,
        from the nominal slot spacing beyond :data:`MAX_OFFSET_PPM`) still taken as jitter;
        beyond it samples were lost and the fit restarts at that frame.
    inlier_samples : float
        Points further than this from the robust line are left out of the least squares
        (:func:`clock_offset_ppm`).
    refit_every : int
        Frames between fits once there is one (the fit is O(window**2); the clock drifts
        slowly); frames are checked against the last fitted line in between.

    Attributes
    ----------
    restarts : int
        Times the fit started again (by :meth:`restart` or a frame off the line).

    Examples
    --------
    >>> fit = ClockFit(1000.0, min_frames=3)
    >>> for k in (0, 1, 2, 5):  # frames 3 and 4 lost: the counters tell
    ...     fit.add(7.0 + k * 1000.1, k)
    >>> round(fit.offset_ppm, 3)
    100.0
    """

    def __init__(self, slot_samples: float, *, window: int = 64, min_frames: int = 8,
                 tolerance_samples: float = 16.0, inlier_samples: float = 3.0,
                 refit_every: int = 8) -> None:
        slot = float(slot_samples)
        if not (math.isfinite(slot) and slot > 0):
            raise ValueError(f"slot_samples={slot_samples} must be a positive number")
        if int(min_frames) < 2 or int(window) < int(min_frames):
            raise ValueError(f"min_frames={min_frames} must be >= 2 and <= window={window}")
        if int(refit_every) < 1:
            raise ValueError(f"refit_every={refit_every} must be >= 1")
        self.slot_samples = slot
        self.window = int(window)
        self.min_frames = int(min_frames)
        self.tolerance_samples = float(tolerance_samples)
        self.inlier_samples = float(inlier_samples)
        self.refit_every = int(refit_every)
        self.restarts = 0
        self._points: collections.deque[tuple[float, int]] = collections.deque(
            maxlen=self.window)
        self._offset_ppm: float | None = None
        self._line: tuple[float, float] | None = None  # start = a + b * counter, samples
        self._since_fit = 0

    def restart(self) -> None:
        """Forget the stretch: samples were lost (or a new stream begins)."""
        if self._points:
            self.restarts += 1
        self._points.clear()
        self._offset_ppm, self._line, self._since_fit = None, None, 0

    def add(self, position: float, counter: int) -> None:
        """One frame of the stretch: its start ``position`` (samples) and unwrapped ``counter``.

        Non-finite input is ignored.
        """
        position = float(position)
        if not math.isfinite(position):
            return
        counter = int(counter)
        if self._points and not self._fits(position, counter):
            self.restart()
        self._points.append((position, counter))
        self._since_fit += 1
        if len(self._points) < self.min_frames:
            return
        if self._line is not None and self._since_fit < self.refit_every:
            return
        self._since_fit = 0
        p, k = np.array(self._points, dtype=np.float64).T
        k0 = k[0]
        k = k - k0  # small numbers for the fit
        off = clock_offset_ppm(p, k, self.slot_samples, inlier_samples=self.inlier_samples)
        self._offset_ppm = off
        if off is None or not math.isfinite(off):
            self._line = None
            return
        b = (1.0 + off * 1e-6) * self.slot_samples
        a = float(np.median(p - b * k)) - b * k0
        self._line = (a, b)

    def _fits(self, position: float, counter: int) -> bool:
        last_p, last_k = self._points[-1]
        step = counter - last_k
        if step <= 0:  # a repeated or older counter: no slot count to go by
            return False
        if self._line is None:
            span = step * self.slot_samples
            error = abs(position - last_p - span)
            return error <= self.tolerance_samples + MAX_OFFSET_PPM * 1e-6 * span
        a, b = self._line
        return abs(position - (a + b * counter)) <= self.tolerance_samples

    @property
    def offset_ppm(self) -> float | None:
        """The offset of the receiver's sample clock, ppm (positive: fast), or None before
        ``min_frames`` frames of one stretch, or when it is beyond :data:`MAX_OFFSET_PPM`
        (the slot length does not match the transmitter's)."""
        off = self._offset_ppm
        if off is None or not math.isfinite(off) or abs(off) > MAX_OFFSET_PPM:
            return None
        return off
