"""Per-tone prediction of the complex channel over the life of the next map.

A map is made from the estimate of frame ``k``, comes into force ``lead`` frames later and stays
in force at least until the next map is allowed. On a fading channel the tones it is loaded for
move meanwhile; loading each tone for its *worst* SNR over that horizon is what pays, so the
horizon has to be predicted. :class:`ChannelPredictor` does it in the complex domain, where a
tone passing through a notch is a smooth path through (or near) zero rather than a cusp in dB:

1. **Common rotation and timing.** The receiver's phase reference and frame timing differ from
   frame to frame: every tone's estimate turns by a common phase plus a phase linear in the
   tone index (a timing step of ``d`` samples is ``2 pi d / N`` per bin). Both are removed
   against the previous (aligned) estimate: the ramp from the angle of
   ``sum(D_k conj(D_{k-1}))`` over neighbouring bins, ``D = H_t conj(H_prev)``, then the common
   phase ``angle(sum(H_t conj(H_prev)))``, so only each tone's own motion is left.
2. **Linear extrapolation.** Per tone, a least-squares line ``a + b (t - t_last)`` through the
   last ``window`` derotated estimates (complex ``a`` and ``b``); the slope is shrunk towards
   zero by its own estimation noise, ``b * max(0, 1 - var_b / |b|**2)`` (the positive-part
   James-Stein rule), with ``var_b`` from the line's residuals, so the estimation noise of a
   static channel does not become a trend and the prediction there is the held value.
3. **Prediction error, measured.** The lines of the last frames are kept; each new estimate is
   compared with what every kept line predicted for it, which gives the mean squared error per
   tone at each horizon of 1, 2, ... frames (exponentially weighted over ``error_tau_s``, pooled
   over the tone and its neighbours either side). The error of one frame ahead is mostly the
   estimation noise of the estimate compared with (which the estimator's back-off already covers);
   the *allowance* at horizon ``h`` is the error there beyond it, ``sqrt(max(e2(h) - e2(1), 0))``:
   zero for a static channel, growing with the horizon where the channel moves.
4. **Worst over the horizon.** For horizons of one frame interval up to ``horizon_s`` the
   predicted magnitude less ``allowance_sigmas`` allowances, squared, gives a lower bound of the
   tone's power; :meth:`ChannelPredictor.fall_db` is its minimum over the horizon relative to
   the fitted present power, in dB (0 or below; bounded by ``floor_db`` relative to the noise).

Why linear extrapolation: the classical (Clarke/Jakes) fading process is smooth (its
autocorrelation ``J0(2 pi fd tau)`` is flat at the origin), so over a fraction of the coherence
time ``0.423 / fd`` a line predicts it far better than holding the last value, whose error grows
as ``2 (1 - J0(2 pi fd tau))`` of the power. Beyond that, prediction needs the Doppler spectrum
(long AR models, as in Duel-Hallen, Hu and Hallen, "Long-range prediction of fading signals",
IEEE Signal Processing Magazine 17(3), 2000), which a short map horizon does not.

Cost: the predictor runs on every estimate, so its state is kept for reuse and its arithmetic
is fixed. The kept estimates and each fit's line sit in rings stored twice over (the newest
rows are always one contiguous block, so nothing is stacked or rolled), all horizons are scored
in one pass, and the phase search keeps its FFT size and work arrays per tone plan. Every
elementwise operation keeps its operands and their order and every reduction is the same call
on the same shape as the plain formulas above, so the outputs are the same bit for bit
(``tests/test_predictor.py`` pins them).
"""

from __future__ import annotations

import math
from types import MappingProxyType

import numpy as np

from brimline.daemon.limits import NON_NEGATIVE, POSITIVE, between, check_values

__all__ = ["ChannelPredictor", "PREDICTOR_LIMITS", "common_rotation", "align_phase"]

#: The limit of each keyword argument of :class:`ChannelPredictor`.
PREDICTOR_LIMITS = MappingProxyType({
    "horizon_s": NON_NEGATIVE,
    "window": between(2, 64),
    "allowance_sigmas": NON_NEGATIVE,
    "error_tau_s": POSITIVE,
    "pool_tones": between(0, 32),
    "floor_db": NON_NEGATIVE,
})

_MAX_STEPS = 64   # horizons kept, in frames


def common_rotation(channel: np.ndarray, previous: np.ndarray) -> float:
    """The phase common to all tones between two channel estimates, radians.

    Parameters
    ----------
    channel, previous : ndarray of complex
        Per-tone estimates of the same tones.

    Returns
    -------
    float
        ``angle(sum(channel * conj(previous)))``; 0 when the sum is zero.

    Notes
    -----
    The maximum-likelihood estimate of a common phase between two noisy vectors (the same
    statistic as a data-aided carrier phase estimator, e.g. Mengali and D'Andrea, "Synchronization
    Techniques for Digital Receivers", 1997, ch. 5); tones with more power weigh more.
    """
    s = np.vdot(previous, channel)   # sum(conj(previous) * channel)
    return 0.0 if s == 0 else math.atan2(s.imag, s.real)


def align_phase(channel: np.ndarray, reference: np.ndarray, tone_index: np.ndarray) -> np.ndarray:
    """``channel`` turned by the phase ramp and common phase that best align it with
    ``reference``.

    Parameters
    ----------
    channel, reference : ndarray of complex
        Per-tone estimates of the same tones.
    tone_index : ndarray of int
        The tones' signed FFT bins.

    Returns
    -------
    ndarray of complex128

    Notes
    -----
    The ramp ``theta`` maximises ``|sum(D_k exp(-1j theta bin_k))|`` with ``D = channel *
    conj(reference)``: the maximum-likelihood estimate of a delay from a frequency response
    (a periodogram peak, as in Rife and Boorstyn, "Single-tone parameter estimation from
    discrete-time observations", IEEE Trans. Inf. Theory 20(5), 1974), searched on a zero-padded
    FFT, refined by a parabola through the peak and one Gauss-Newton step on the remaining
    phases; the common phase is the angle of the sum at ``theta``.
    """
    return _PhaseSearch(tone_index).align(np.asarray(channel, dtype=np.complex128),
                                          reference)


class _PhaseSearch:
    """The per-plan constants of :func:`align_phase` and its work arrays (one FFT size, the
    grid's zero padding written once)."""

    def __init__(self, tone_index: np.ndarray) -> None:
        bins = np.array(tone_index, dtype=np.int64)
        self.key = bins.tobytes()
        self.bins = bins
        span = int(bins.max() - bins.min()) + 1 if bins.size else 1
        self.size = size = 1 << max(6, int(math.ceil(math.log2(4 * span))))
        self.slots = (bins - bins.min()) % size
        self.grid = np.zeros(size, dtype=np.complex128)
        self.power = np.empty(size)
        self.d = np.empty(bins.size, dtype=np.complex128)
        self.turn = np.empty(bins.size, dtype=np.complex128)

    def align(self, h: np.ndarray, reference: np.ndarray) -> np.ndarray:
        """:func:`align_phase` of ``h`` (complex128) with the same arithmetic, in work arrays;
        returns a fresh array."""
        bins, size, turn = self.bins, self.size, self.turn
        d = np.multiply(h, np.conj(reference), out=self.d)
        grid = self.grid
        grid[self.slots] = d
        power = np.abs(np.fft.fft(grid), out=self.power)
        np.square(power, out=power)            # what ``** 2`` computes
        k = int(power.argmax())
        y0, y1, y2 = power[k - 1], power[k], power[(k + 1) % size]
        den = y0 - 2.0 * y1 + y2
        frac = 0.5 * (y0 - y2) / den if den < 0 else 0.0
        theta = 2.0 * math.pi * (k + frac) / size
        if theta > math.pi:
            theta -= 2.0 * math.pi
        rest = np.multiply(-1j * theta, bins, out=turn)
        np.exp(rest, out=rest)
        np.multiply(d, rest, out=rest)
        total = rest.sum()
        if total != 0:
            phi = rest * np.conj(total)
            phi = np.arctan2(phi.imag, phi.real)   # np.angle, without its wrapper
        else:
            phi = np.zeros(bins.size)
        w = np.abs(rest)
        centred = bins - (w @ bins) / max(float(w.sum()), 1e-300)
        wc = np.multiply(w, centred, out=w)
        den = float(wc @ centred)
        if den > 0:
            theta += float(wc @ phi) / den
        ramp = np.multiply(-1j * theta, bins, out=turn)
        np.exp(ramp, out=ramp)
        h = h * ramp
        rot = common_rotation(h, reference)
        np.multiply(h, complex(math.cos(rot), -math.sin(rot)), out=h)
        return h


class _Ring:
    """Rows of equal length kept twice over (``rows[i]`` and ``rows[i + capacity]``), so the
    newest ``count`` are always one contiguous block: an append writes two rows, nothing moves.
    ``newest_first`` picks the block's order."""

    def __init__(self, capacity: int, n_tones: int, *, newest_first: bool) -> None:
        self.capacity = capacity
        self.rows = np.empty((2 * capacity, n_tones), dtype=np.complex128)
        self.newest_first = newest_first
        self.pos = 0          # slot of the newest row
        self.count = 0

    def advance(self) -> None:
        """Make room for a new newest row (its two slots are ``pos`` and ``pos + capacity``);
        the oldest falls out when full."""
        c = self.capacity
        self.pos = (self.pos + (-1 if self.newest_first else 1)) % c
        self.count = min(self.count + 1, c)

    def push(self, row: np.ndarray) -> None:
        """Append ``row``; the oldest falls out when full."""
        self.advance()
        self.rows[self.pos] = row
        self.rows[self.pos + self.capacity] = row

    def replace_newest(self, row: np.ndarray) -> None:
        """Overwrite the newest row."""
        self.rows[self.pos] = row
        self.rows[self.pos + self.capacity] = row

    def block(self) -> np.ndarray:
        """The kept rows, one contiguous view (newest first or oldest first)."""
        c, p, n = self.capacity, self.pos, self.count
        if self.newest_first:
            return self.rows[p:p + n]
        return self.rows[p + c - n + 1:p + c + 1]

    def sync(self) -> None:
        """After writing through :meth:`block`: copy each kept row to its twin."""
        c, p, n = self.capacity, self.pos, self.count
        start = p if self.newest_first else p + c - n + 1
        for i in range(start, start + n):
            self.rows[(i + c) % (2 * c)] = self.rows[i]

    def keep(self, n: int) -> None:
        """Drop all but the newest ``n`` rows."""
        self.count = min(self.count, n)

    def grown(self, capacity: int) -> _Ring:
        """A ring of ``capacity`` holding the same rows in the same order."""
        ring = _Ring(capacity, self.rows.shape[1], newest_first=self.newest_first)
        n = self.count
        ring.count = n
        if n:
            ring.pos = 0 if self.newest_first else n - 1
            block = self.block()
            ring.rows[:n] = block
            ring.rows[capacity:capacity + n] = block
        return ring


class ChannelPredictor:
    """Predict each tone's complex channel over a horizon and bound its worst power.

    Parameters
    ----------
    horizon_s : float
        Far end of the horizon, seconds after the newest estimate (0: no prediction; the near end
        is one frame interval).
    window : int
        Estimates in each tone's least-squares line.
    allowance_sigmas : float
        Measured prediction errors (beyond the one-frame error) subtracted from the predicted
        magnitude.
    error_tau_s : float
        Time constant of the prediction-error tracker, seconds.
    pool_tones : int
        Neighbours each side over which the prediction error is pooled.
    floor_db : float
        The predicted worst SNR is not taken below ``-floor_db`` dB (a tone predicted to vanish
        falls to about that, so the result stays finite).

    Notes
    -----
    The keyword arguments are the ``predict_*`` keys of the ``estimator:`` config section (the
    estimator owns one predictor). Deterministic and clock-free: time is the estimates' own.
    """

    def __init__(self, *, horizon_s: float = 0.0, window: int = 5,
                 allowance_sigmas: float = 1.0, error_tau_s: float = 1.0, pool_tones: int = 2,
                 floor_db: float = 10.0) -> None:
        check_values(locals(), PREDICTOR_LIMITS, prefix="predictor.")
        self.horizon_s = float(horizon_s)
        self.window = int(window)
        self.allowance_sigmas = float(allowance_sigmas)
        self.error_tau_s = float(error_tau_s)
        self.pool_tones = int(pool_tones)
        self.floor_db = float(floor_db)
        self._search: _PhaseSearch | None = None   # per tone plan
        self._weights: dict[tuple, tuple] = {}      # per pattern of times, see _line_weights
        self.reset()

    def reset(self) -> None:
        """Forget all estimates (a new plan, a retune, a stale link)."""
        self._times: list[float] = []          # of the kept estimates, oldest first
        self._hist: _Ring | None = None        # derotated estimates, oldest first
        self._lines: _Ring | None = None       # each fit's a and b side by side, newest first
        self._line_t: list[float] = []         # each fit's time, newest first
        self._err2 = None                      # (steps, tones) mean squared error per horizon
        self._err_n = None                     # updates seen per horizon
        self._a = self._b = None
        self._a_pow = None                     # |a|**2, made when first asked for
        self._dt = math.nan

    # ------------------------------------------------------------------ input

    def update(self, time_s: float, channel: np.ndarray, tone_index: np.ndarray) -> None:
        """Take one channel estimate.

        Parameters
        ----------
        time_s : float
            When the channel was measured, seconds (increasing).
        channel : ndarray of complex
            Per-tone channel estimate (same tones every call; :meth:`reset` between plans).
        tone_index : ndarray of int
            The tones' signed FFT bins.
        """
        h = np.array(channel, dtype=np.complex128)
        if self._hist is not None and self._hist.rows.shape[1] != h.size:
            self.reset()
        if self._hist is not None:
            # Against the last estimate, not the line's prediction: where the whole band fades
            # together, a line heading through zero would turn the next estimate over.
            h = self._search_for(tone_index).align(h, self._hist.block()[-1])
            dt = float(time_s) - self._times[-1]
            self._dt = dt if math.isnan(self._dt) else 0.9 * self._dt + 0.1 * dt
            self._score(float(time_s), h)
        else:
            self._hist = _Ring(self.window, h.size, newest_first=False)
        self._times.append(float(time_s))
        self._hist.push(h)
        if len(self._times) > self.window:
            del self._times[0]
        self._fit()

    def _search_for(self, tone_index: np.ndarray) -> _PhaseSearch:
        search = self._search
        if search is None or search.key != np.asarray(tone_index, dtype=np.int64).tobytes():
            search = self._search = _PhaseSearch(tone_index)
        return search

    def restart(self, tones: np.ndarray) -> None:
        """Start the lines of ``tones`` (a boolean mask) afresh at their newest estimate: the
        kept estimates of those tones take its value, so the line is flat until new estimates
        arrive (for a step of the channel, which is no trend).

        Parameters
        ----------
        tones : ndarray of bool
            Which tones.
        """
        if self._hist is None:
            return
        mask = np.asarray(tones, dtype=bool)
        block = self._hist.block()
        np.copyto(block[:-1], block[-1], where=mask)
        self._hist.sync()
        self._fit(replace=True)   # the line just replaced is not scored

    def _score(self, t: float, h: np.ndarray) -> None:
        """Compare ``h`` with what each kept line predicted for ``t``; update the errors."""
        lines = self._lines
        if lines is None or not lines.count:
            return
        n_steps = min(_MAX_STEPS, max(1, self._steps()))
        n_tones = h.size
        if self._err2 is None or self._err2.shape != (n_steps, n_tones):
            self._err2 = np.zeros((n_steps, n_tones))
            self._err_n = np.zeros(n_steps)
        beta = -math.expm1(-self._dt / self.error_tau_s)
        n = min(lines.count, n_steps)
        block = lines.block()[:n].reshape(n, 2, n_tones)   # (ages, a or b, tones)
        err2, err_n = self._err2[:n], self._err_n[:n]
        # the same arithmetic as one tone line at a time, for all ages at once
        e = np.multiply(block[:, 1], np.array([t - t0 for t0 in self._line_t[:n]])[:, None])
        np.add(block[:, 0], e, out=e)
        np.subtract(h, e, out=e)
        e2 = np.multiply(e.real, e.real)
        e2 += np.multiply(e.imag, e.imag, out=e.real)
        e2 -= err2
        weight = np.maximum(beta, 1.0 / (err_n + 1.0))
        e2 *= weight[:, None]
        err2 += e2
        err_n += 1.0
        lines.keep(n_steps)
        del self._line_t[n_steps:]

    def _fit(self, replace: bool = False) -> None:
        hs = self._hist.block()                    # (frames, tones), contiguous
        m = hs.shape[0]
        if m < 2:
            self._a, self._b = hs[-1].copy(), np.zeros(hs.shape[1], dtype=np.complex128)
        else:
            t, t_col, tm, tc, sxx = self._line_weights()
            hm = np.add.reduce(hs, axis=0)         # hs.mean(axis=0), step by step
            np.true_divide(hm, m, out=hm)
            # real weights on the real and imaginary parts: BLAS, not a complex-object loop
            pair = hs.view(np.float64)             # (frames, 2 * tones), re/im interleaved
            b = (tc @ pair).view(np.complex128) / sxx
            if m > 2:
                a = hm - b * tm                    # value of the line at the newest time
                resid = np.subtract(hs, a)
                resid -= t_col * b
                resid = resid.view(np.float64)
                s2 = np.einsum("ij,ij->j", resid, resid).reshape(-1, 2).sum(axis=1) / (m - 2)
                b2 = b.real ** 2
                b2 += b.imag ** 2
                # max(0, 1 - s2 / sxx / b2) where b2 > 0, else 0
                moving = b2 > 0
                shrink = np.divide(s2 / sxx, b2, out=np.zeros_like(b2), where=moving)
                np.subtract(1.0, shrink, out=shrink)
                np.maximum(0.0, shrink, out=shrink)
                shrink[~moving] = 0.0
                b *= shrink
                np.multiply(b, tm, out=a)
                a = np.subtract(hm, a, out=a)
            else:
                b = np.zeros_like(b)
                a = hs[-1].copy()
            self._a, self._b = a, b
        self._a_pow = None
        self._keep_line(replace)

    def _line_weights(self) -> tuple:
        """The kept estimates' times relative to the newest (as a row and a column), their
        mean, centred times and sum of squares: the constants of the least-squares line,
        remembered per pattern of times (a steady frame rate repeats a few)."""
        last = self._times[-1]
        key = tuple([x - last for x in self._times])   # what np.subtract gives, element by element
        found = self._weights.get(key)
        if found is None:
            if len(self._weights) >= 64:
                self._weights.clear()
            t = np.array(key)
            tm = t.mean()
            tc = t - tm
            found = self._weights[key] = (t, t[:, None], tm, tc, float(tc @ tc))
        return found

    def _keep_line(self, replace: bool) -> None:
        """Keep the newest line (a, b) for scoring; ``replace`` overwrites the newest kept."""
        n_tones = self._a.size
        if self._lines is None or self._lines.rows.shape[1] != 2 * n_tones:
            self._lines = _Ring(8, 2 * n_tones, newest_first=True)
            self._line_t = []
        lines = self._lines
        if not (replace and lines.count):
            if lines.count == lines.capacity:
                self._lines = lines = lines.grown(2 * lines.capacity)
            lines.advance()
            self._line_t.insert(0, self._times[-1])
        else:
            self._line_t[0] = self._times[-1]
        slot = lines.rows.view()
        for row in (lines.pos, lines.pos + lines.capacity):
            slot[row, :n_tones] = self._a
            slot[row, n_tones:] = self._b

    def _steps(self) -> int:
        if not (self._dt > 0):
            return 1
        return max(1, int(math.ceil(self.horizon_s / self._dt - 1e-9)))

    # ------------------------------------------------------------------ output

    def predict(self, ahead_s: float) -> np.ndarray | None:
        """The predicted complex channel ``ahead_s`` after the newest estimate (None before
        the first), derotated to the newest estimate's common phase."""
        if self._a is None:
            return None
        return self._a + self._b * float(ahead_s)

    @property
    def frame_interval_s(self) -> float:
        """The smoothed interval between estimates, seconds (NaN before the second)."""
        return self._dt

    def _present_power(self) -> np.ndarray:
        """``|a|**2`` of the newest fit (kept until the next fit; never handed out)."""
        if self._a_pow is None:
            self._a_pow = np.abs(self._a) ** 2
        return self._a_pow

    def change_db(self, ahead_s: float, noise_var: np.ndarray) -> np.ndarray | None:
        """Per tone: the predicted power ``ahead_s`` after the newest estimate relative to the
        fitted present power, dB (no allowance; powers floored as in :meth:`fall_db`); None
        before two estimates."""
        if self._a is None or len(self._times) < 2 or not math.isfinite(ahead_s):
            return None
        floor = np.asarray(noise_var, dtype=np.float64) * 10.0 ** (-self.floor_db / 10.0)
        ahead = self._b * float(ahead_s)
        np.add(self._a, ahead, out=ahead)
        power = np.abs(ahead)
        np.square(power, out=power)
        power += floor
        now = np.add(self._present_power(), floor, out=floor)
        power /= now
        np.log10(power, out=power)
        power *= 10.0
        return power

    def allowance(self) -> np.ndarray | None:
        """Per horizon of 1, 2, ... frames (rows) and tone: the RMS prediction error beyond the
        one-frame error, pooled over neighbours (None until measured)."""
        if self._err2 is None or self._err_n[0] == 0:
            return None
        e2 = self._err2
        w = self.pool_tones
        steps, n_tones = e2.shape
        if w and n_tones > 1:
            # the running sum over the edge-padded rows (what np.pad(mode="edge") gives)
            padded = np.empty((steps, n_tones + 2 * w + 1))
            padded[:, :w + 1] = e2[:, :1]
            padded[:, w + 1:w + 1 + n_tones] = e2
            padded[:, w + 1 + n_tones:] = e2[:, -1:]
            c = np.cumsum(padded, axis=1, out=padded)
            e2 = np.subtract(c[:, 2 * w + 1:], c[:, :-2 * w - 1])
            e2 /= 2 * w + 1
        # horizons not measured yet take the farthest measured one
        seen = self._err_n > 0
        if not seen.all():
            e2 = np.where(seen[:, None], e2, e2[np.flatnonzero(seen)[-1]])
        out = np.subtract(e2, e2[0])
        np.maximum(out, 0.0, out=out)
        return np.sqrt(out, out=out)

    def fall_db(self, noise_var: np.ndarray) -> np.ndarray | None:
        """Per tone: the worst predicted power over the horizon, less the allowance, relative to
        the fitted present power, dB (0 or below).

        Parameters
        ----------
        noise_var : ndarray
            Per-tone noise variance, on the scale of ``|channel|**2``; the worst power is
            floored at ``noise_var * 10**(-floor_db / 10)``, the present one as well.

        Returns
        -------
        ndarray or None
            None with prediction off (``horizon_s`` 0) or before two estimates.
        """
        if self.horizon_s <= 0 or self._a is None or len(self._times) < 2 or not self._dt > 0:
            return None
        steps = self._steps()
        ahead = self._dt * np.arange(1, min(steps, _MAX_STEPS) + 1)
        path = np.multiply(ahead[:, None], self._b)
        np.add(self._a, path, out=path)
        mag = np.abs(path)
        allow = self.allowance()
        if allow is not None and self.allowance_sigmas > 0:
            k = min(allow.shape[0], mag.shape[0])
            rows = allow[:k] if k == mag.shape[0] else allow[np.minimum(
                np.arange(mag.shape[0]), k - 1)]
            rows = np.multiply(self.allowance_sigmas, rows, out=allow[:k] if k == mag.shape[0]
                               else rows)
            mag -= rows
            np.maximum(mag, 0.0, out=mag)
        np.square(mag, out=mag)
        floor = np.asarray(noise_var, dtype=np.float64) * 10.0 ** (-self.floor_db / 10.0)
        worst = mag.min(axis=0)
        worst += floor
        now = np.add(self._present_power(), floor, out=floor)
        worst /= now
        np.log10(worst, out=worst)
        worst *= 10.0
        return np.minimum(worst, 0.0, out=worst)
