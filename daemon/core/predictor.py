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
    h = np.asarray(channel, dtype=np.complex128)
    bins = np.asarray(tone_index, dtype=np.int64)
    d = h * np.conj(reference)
    span = int(bins.max() - bins.min()) + 1 if bins.size else 1
    size = 1 << max(6, int(math.ceil(math.log2(4 * span))))
    grid = np.zeros(size, dtype=np.complex128)
    grid[(bins - bins.min()) % size] = d
    power = np.abs(np.fft.fft(grid)) ** 2
    k = int(np.argmax(power))
    y0, y1, y2 = power[k - 1], power[k], power[(k + 1) % size]
    den = y0 - 2.0 * y1 + y2
    frac = 0.5 * (y0 - y2) / den if den < 0 else 0.0
    theta = 2.0 * math.pi * (k + frac) / size
    if theta > math.pi:
        theta -= 2.0 * math.pi
    # one Gauss-Newton step on the phases left (weighted by |D|), beyond the grid's precision
    rest = d * np.exp(-1j * theta * bins)
    total = rest.sum()
    phi = np.angle(rest * np.conj(total)) if total != 0 else np.zeros(bins.size)
    w = np.abs(rest)
    centred = bins - (w @ bins) / max(float(w.sum()), 1e-300)
    den = float((w * centred) @ centred)
    if den > 0:
        theta += float((w * centred) @ phi) / den
    h = h * np.exp(-1j * theta * bins)
    rot = common_rotation(h, reference)
    return h * complex(math.cos(rot), -math.sin(rot))


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
        self.reset()

    def reset(self) -> None:
        """Forget all estimates (a new plan, a retune, a stale link)."""
        self._times: list[float] = []
        self._hist: list[np.ndarray] = []      # derotated estimates, oldest first
        self._lines: list[tuple[float, np.ndarray, np.ndarray]] = []  # (t, a, b), newest last
        self._err2 = None                      # (steps, tones) mean squared error per horizon
        self._err_n = None                     # updates seen per horizon
        self._a = self._b = None
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
        h = np.array(channel, dtype=np.complex128)   # a copy: restart() writes the history
        if self._hist and self._hist[-1].size != h.size:
            self.reset()
        if self._hist:
            # Against the last estimate, not the line's prediction: where the whole band fades
            # together, a line heading through zero would turn the next estimate over.
            h = align_phase(h, self._hist[-1], tone_index)
            dt = float(time_s) - self._times[-1]
            self._dt = dt if math.isnan(self._dt) else 0.9 * self._dt + 0.1 * dt
            self._score(float(time_s), h)
        self._times.append(float(time_s))
        self._hist.append(h)
        if len(self._hist) > self.window:
            del self._times[0], self._hist[0]
        self._fit()

    def restart(self, tones: np.ndarray) -> None:
        """Start the lines of ``tones`` (a boolean mask) afresh at their newest estimate: the
        kept estimates of those tones take its value, so the line is flat until new estimates
        arrive (for a step of the channel, which is no trend).

        Parameters
        ----------
        tones : ndarray of bool
            Which tones.
        """
        if not self._hist:
            return
        mask = np.asarray(tones, dtype=bool)
        newest = self._hist[-1]
        for h in self._hist[:-1]:
            np.copyto(h, newest, where=mask)
        self._fit()
        self._lines.pop(-2)   # the line just replaced is not scored

    def _score(self, t: float, h: np.ndarray) -> None:
        """Compare ``h`` with what each kept line predicted for ``t``; update the errors."""
        lines = self._lines
        if not lines:
            return
        n_steps = min(_MAX_STEPS, max(1, self._steps()))
        if self._err2 is None or self._err2.shape != (n_steps, h.size):
            self._err2 = np.zeros((n_steps, h.size))
            self._err_n = np.zeros(n_steps)
        beta = -math.expm1(-self._dt / self.error_tau_s)
        for age, (t0, a, b) in enumerate(reversed(lines)):
            if age >= n_steps:
                break
            e = h - (a + b * (t - t0))
            e2 = e.real * e.real + e.imag * e.imag
            w = max(beta, 1.0 / (self._err_n[age] + 1.0))
            self._err2[age] += w * (e2 - self._err2[age])
            self._err_n[age] += 1.0
        del lines[:-n_steps]

    def _fit(self) -> None:
        t = np.asarray(self._times) - self._times[-1]
        hs = np.stack(self._hist)                  # (frames, tones)
        m = t.size
        if m < 2:
            self._a, self._b = hs[-1], np.zeros(hs.shape[1], dtype=np.complex128)
        else:
            tc = t - t.mean()
            sxx = float(tc @ tc)
            hm = hs.mean(axis=0)
            # real weights on the real and imaginary parts: BLAS, not a complex-object loop
            pair = hs.view(np.float64)             # (frames, 2 * tones), re/im interleaved
            b = (tc @ pair).view(np.complex128) / sxx
            a = hm - b * t.mean()                  # value of the line at the newest time
            if m > 2:
                resid = (hs - a - t[:, None] * b).view(np.float64)
                s2 = np.einsum("ij,ij->j", resid, resid).reshape(-1, 2).sum(axis=1) / (m - 2)
                b2 = b.real ** 2 + b.imag ** 2
                with np.errstate(divide="ignore", invalid="ignore"):
                    shrink = np.where(b2 > 0, np.maximum(0.0, 1.0 - s2 / sxx / b2), 0.0)
                b = b * shrink
                a = hm - b * t.mean()
            else:
                b = np.zeros_like(b)
                a = hs[-1]
            self._a, self._b = a, b
        self._lines.append((self._times[-1], self._a, self._b))

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

    def change_db(self, ahead_s: float, noise_var: np.ndarray) -> np.ndarray | None:
        """Per tone: the predicted power ``ahead_s`` after the newest estimate relative to the
        fitted present power, dB (no allowance; powers floored as in :meth:`fall_db`); None
        before two estimates."""
        if self._a is None or len(self._hist) < 2 or not math.isfinite(ahead_s):
            return None
        floor = np.asarray(noise_var, dtype=np.float64) * 10.0 ** (-self.floor_db / 10.0)
        ahead = self._a + self._b * float(ahead_s)
        return 10.0 * np.log10((np.abs(ahead) ** 2 + floor) / (np.abs(self._a) ** 2 + floor))

    def allowance(self) -> np.ndarray | None:
        """Per horizon of 1, 2, ... frames (rows) and tone: the RMS prediction error beyond the
        one-frame error, pooled over neighbours (None until measured)."""
        if self._err2 is None or self._err_n[0] == 0:
            return None
        e2 = self._err2
        w = self.pool_tones
        if w and e2.shape[1] > 1:
            c = np.cumsum(np.pad(e2, ((0, 0), (w + 1, w)), mode="edge"), axis=1)
            e2 = (c[:, 2 * w + 1:] - c[:, :-2 * w - 1]) / (2 * w + 1)
        # horizons not measured yet take the farthest measured one
        seen = self._err_n > 0
        e2 = np.where(seen[:, None], e2, e2[np.flatnonzero(seen)[-1]])
        return np.sqrt(np.maximum(e2 - e2[0], 0.0))

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
        if self.horizon_s <= 0 or self._a is None or len(self._hist) < 2 or not self._dt > 0:
            return None
        steps = self._steps()
        ahead = self._dt * np.arange(1, min(steps, _MAX_STEPS) + 1)
        mag = np.abs(self._a[None, :] + np.outer(ahead, self._b))
        allow = self.allowance()
        if allow is not None and self.allowance_sigmas > 0:
            k = min(allow.shape[0], mag.shape[0])
            idx = np.minimum(np.arange(mag.shape[0]), k - 1)
            mag = np.maximum(mag - self.allowance_sigmas * allow[idx], 0.0)
        floor = np.asarray(noise_var, dtype=np.float64) * 10.0 ** (-self.floor_db / 10.0)
        worst = (mag * mag).min(axis=0) + floor
        now = np.abs(self._a) ** 2 + floor
        return np.minimum(10.0 * np.log10(worst / now), 0.0)
