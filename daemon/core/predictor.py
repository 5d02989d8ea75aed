"""Per-tone prediction of the complex channel over the life of the next map.

A map is made from the estimate of frame ``k``, comes into force ``lead`` frames later and stays
in force at least until the next map is allowed. On a fading channel the tones it is loaded for
move meanwhile; loading each tone for its *worst* SNR over that horizon is what pays, so the
horizon has to be predicted. :class:`ChannelPredictor` does it in the complex domain, where a
tone passing through a notch is a smooth path through (or near) zero rather than a cusp in dB:

1. **Common rotation and timing.** The receiver's phase reference and frame timing differ from
   frame to frame: every tone's estimate turns by a common phase plus a phase linear in the
   tone index (a timing step of ``d`` samples is ``2 pi d / N`` per bin). Both are removed
   against the previous (aligned) estimate (:func:`align_phase`: the ramp that maximises the
   periodogram of ``H_t conj(H_prev)`` over the bins, by two Newton steps from the lag-one
   correlation over neighbouring bins, or a zero-padded FFT search where those do not reach a
   clear peak; then the common phase), so only each tone's own motion is left. The ramp must
   be right to a few thousandths of a radian per bin: at 0.005 rad/bin the band's edges turn
   by half a radian, which the prediction takes for fading (the lag-one correlation alone is
   off by that much and made the tail errors of the prediction 2 dB worse on EVA at 1 Hz).
2. **Denoising across tones.** A channel whose delay spread is ``tau`` varies over the tones
   no faster than ``tau`` times the tone spacing cycles per tone: its frequency response lies
   (almost) in the span of a few discrete prolate spheroidal vectors of the tone set
   (:func:`band_basis`; Slepian 1978). Each estimate is projected on them around its delay
   centre (the angle of the lag-one correlation over bins), which keeps the channel and
   removes most of the estimation noise (the share ``1 - D / N`` of it). ``delay_width`` is
   the half-width of that window: the default 0.075 cycles per tone covers the 5 us of the
   3GPP ETU profile at 15 kHz tones (TS 36.101 Annex B.2), centred. An estimate that loses
   more than 5 % of its power to the projection (a longer delay spread, a synthetic channel
   of independent tones) is kept as it came; so is each tone the projection moves by more
   than its noise variance (a channel estimate over N known symbols errs by about
   ``noise_var / N``): a step across the band (a filter edge, a fade of a band of tones) is
   outside every delay window, and its smear would raise the tones inside the step by many dB.
3. **Prediction under Clarke's model.** Per tone, the next frames are a linear combination of
   the last ``window`` estimates, with the Wiener-Hopf weights of a process whose
   autocorrelation is ``J0(2 pi f_D tau)`` (:func:`clarke_weights`; Jakes 1974;
   Duel-Hallen, Hu and Hallen 2000). ``f_D`` is measured, not configured: a bank of such
   filters for fading rates about 1.5x apart (0 to 0.15 cycles per frame) is scored on every
   other estimate by its error at the far end of the horizon, and the one with the least
   smoothed error is used (another only when 10 % better: :attr:`ChannelPredictor.doppler_hz`).
   Choosing by measured error rather than by the correlation's ``J0`` inverted also copes
   with what the alignment takes out of the motion and with channels that are not Clarke's.
   A static channel is predicted by the average of the window, a fading one by its
   extrapolation. Where even the best filter's far error is above half the channel's power
   (:data:`PREDICTABLE_ERROR`; fading faster than a fraction of the horizon, and before it is
   measured) the predictor offers nothing and the estimator keeps its plain view.
4. **Prediction error, measured.** Each new estimate is compared with what the filter
   predicted for it from the windows that ended 1, 2, ... frames earlier (one matrix product
   over the kept estimates), which gives the mean squared error per tone at each horizon
   (exponentially weighted over ``error_tau_s``, pooled over the tone and its neighbours
   either side). The *allowance* at horizon ``h`` is the error there beyond the one-frame error
   (mostly estimation noise), ``sqrt(max(e2(h) - e2(1), 0))``: zero for a static channel,
   growing with the horizon where the channel moves.
5. **Worst over the horizon.** For horizons of one frame interval up to ``horizon_s`` the
   predicted magnitude less ``allowance_sigmas`` allowances, squared, gives a lower bound of the
   tone's power. :meth:`ChannelPredictor.worst_snr_db` is its minimum over the horizon on the
   smoothed noise variance: the per-tone noise of one frame is a noisy estimate of its own
   (about 1.2 dB spread from 12 data symbols), the noise of a link moves slowly
   (``noise_tau_s``), and each tone's is taken at least at the mean of its neighbours
   (noise and interference are a floor with peaks; a tone far below its neighbours was
   estimated from wrong decisions). :meth:`ChannelPredictor.restart` (a confirmed jump) lifts
   a tone's smoothed noise at once to its newest where that is higher (an interferer that
   came). :meth:`ChannelPredictor.fall_db` is the fall relative to the predicted present
   power, for sources whose channel and noise do not explain their SNR.

Why this and not a per-tone line: a line through the last few estimates ignores how fast the
channel fades and, through noisy estimates, turns noise into trends; the Clarke filter knows
the fading rate from the data and averages where the channel is still. Beyond a fraction of the
coherence time ``0.423 / f_D`` no filter predicts a Rayleigh tone well (at 5 Hz Doppler and a
0.1 s horizon ``2 pi f_D tau`` is 3.1, beyond ``J0``'s first zero).

Cost: the predictor runs on every estimate, so it is a few fixed products per frame: the kept
estimates sit in a ring stored twice over (the newest rows are always one contiguous block),
complex rows are treated as pairs of reals for the matrix products, the basis and the filter
weights are made once per plan and choice, all horizons are predicted and scored in one
product each, and what moves slowly is refreshed every few estimates (the filter choice every
other one, the delay centre and the pooled error and noise statistics every fourth).
"""

from __future__ import annotations

import math
from types import MappingProxyType

import numpy as np
from scipy.linalg import eigh
from scipy.special import j0

from brimline.daemon.limits import NON_NEGATIVE, POSITIVE, between, check_values

__all__ = ["ChannelPredictor", "PREDICTOR_LIMITS", "common_rotation", "align_phase",
           "clarke_weights", "band_basis"]

#: The limit of each keyword argument of :class:`ChannelPredictor`.
PREDICTOR_LIMITS = MappingProxyType({
    "horizon_s": NON_NEGATIVE,
    "window": between(2, 64),
    "allowance_sigmas": NON_NEGATIVE,
    "error_tau_s": POSITIVE,
    "pool_tones": between(0, 32),
    "floor_db": NON_NEGATIVE,
    "delay_width": between(0, 0.5),
    "noise_tau_s": POSITIVE,
})

_MAX_STEPS = 64        # horizons kept, in frames
_RIDGE = 1e-3          # noise-to-signal floor of the prediction filter (regularisation)
#: Candidate fading rates of the prediction filter, ``2 pi f_D dt`` (f_D times the frame
#: interval: 0 to 0.12 cycles per frame, 0 to 6 Hz at 50 frames/s), about 1.5x apart.
_BANK_X = 2 * np.pi * np.array([0.0, 0.004, 0.006, 0.009, 0.0135, 0.02, 0.03, 0.045, 0.07,
                                0.1, 0.15])
_NEWTON_STEPS = 2      # Newton steps of the timing ramp from its lag-one start
_CHOOSE_EVERY = 2      # estimates between scorings of the candidate filters
_POOL_EVERY = 4        # estimates between poolings of the error and noise statistics
_SLOW = ("allowance", "noise")
_PROJECTION_LOSS = 0.05   # share of an estimate's power the projection may remove
_CENTRE_EVERY = 4      # estimates between looks at the delay centre
_COHERENT = 0.85       # |sum| / sum|.| below which the ramp is searched in full
_CHOICE_TAU_S = 2.0    # time constant of the candidates' error tracking, s
#: The far-horizon error (relative to the channel's power) below which the prediction is
#: loaded on: above it the channel decorrelates within the horizon (fading faster than a
#: fraction of the map's life) and the present view with its spread serves better.
PREDICTABLE_ERROR = 0.5
#: Half-width in tones of the local mean that floors each tone's noise variance.
NOISE_POOL_TONES = 8
_BASES: dict[tuple, np.ndarray] = {}   # per tone set and width (eigenvectors are costly)


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
    discrete-time observations", IEEE Trans. Inf. Theory 20(5), 1974), searched on an FFT
    zero-padded to twice the span, refined by a parabola through the peak and one Gauss-Newton
    step on the remaining phases; the common phase is the angle of the sum at ``theta``.
    (The lag-one correlation over bins alone was tried: cheaper, but its ramp errors made
    the prediction's tail errors about 2 dB worse on EVA at 1 Hz.)
    """
    return _Aligner(tone_index).align(np.asarray(channel, dtype=np.complex128), reference)


class _Aligner:
    """The per-plan constants of :func:`align_phase` and its work arrays (one FFT size, the
    grid's zero padding written once)."""

    def __init__(self, tone_index: np.ndarray) -> None:
        bins = np.array(tone_index, dtype=np.int64)
        self.key = bins.tobytes()
        self.bins = bins
        near = np.flatnonzero(np.diff(bins) == 1)
        self.lo, self.hi = near, near + 1   # index pairs one bin apart (the delay centre)
        if not near.size:   # no neighbours one bin apart: any pair
            self.lo, self.hi = np.arange(bins.size - 1), np.arange(1, bins.size)
        self.fbins = bins.astype(np.float64)
        self.fbins2 = self.fbins * self.fbins
        self.minus_j_bins = -1j * self.fbins
        span = int(bins.max() - bins.min()) + 1 if bins.size else 1
        self.size = size = 1 << max(6, int(math.ceil(math.log2(2 * span))))
        self.slots = (bins - bins.min()) % size
        self.grid = np.zeros(size, dtype=np.complex128)
        self.power = np.empty(size)
        self.d = np.empty(bins.size, dtype=np.complex128)
        self.turn = np.empty(bins.size, dtype=np.complex128)

    def align(self, h: np.ndarray, reference: np.ndarray) -> np.ndarray:
        """:func:`align_phase` of ``h`` (complex128): one Newton step on the periodogram from
        the lag-one start, the zero-padded FFT search where that does not reach a clear peak;
        returns a fresh array."""
        d = h * np.conj(reference)
        s = np.vdot(d[self.lo], d[self.hi])
        theta = math.atan2(s.imag, s.real) if s != 0 else 0.0
        b = self.fbins
        for _ in range(_NEWTON_STEPS):
            w = np.exp(self.minus_j_bins * theta)
            w *= d
            s0 = w.sum()
            s1 = b @ w          # S' / (-1j)
            s2 = self.fbins2 @ w   # S'' / (-1)
            # f = |S|**2: f' = 2 Re(S' conj(S)), f'' = 2 Re(S'' conj(S)) + 2 |S'|**2
            f1 = 2.0 * (-1j * s1 * s0.conjugate()).real
            f2 = -2.0 * (s2 * s0.conjugate()).real + 2.0 * (s1.real ** 2 + s1.imag ** 2)
            if not f2 < 0:
                break
            theta -= f1 / f2
        turned = h * np.exp(self.minus_j_bins * theta)
        s0 = np.vdot(reference, turned)     # sum(h * turn * conj(reference))
        if not abs(s0) >= _COHERENT * float(np.abs(d).sum()):
            # the start was off the main lobe (a large timing step) or the estimates hardly
            # agree: the full search
            return self.search(h, reference)
        h = turned
        h *= complex(s0.real, -s0.imag) / abs(s0)
        return h

    def search(self, h: np.ndarray, reference: np.ndarray) -> np.ndarray:
        """The periodogram peak on the zero-padded FFT, a parabola through it and one
        Gauss-Newton step on the remaining phases; returns a fresh array."""
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


def band_basis(tone_index: np.ndarray, width: float) -> np.ndarray:
    """An orthonormal basis of the channels whose delay spread, times the tone spacing, lies
    within ``+-width`` cycles per tone: the discrete prolate spheroidal (Slepian) vectors of the
    tone set.

    Parameters
    ----------
    tone_index : ndarray of int
        The tones (FFT bins; gaps allowed).
    width : float
        Half-width of the delay window in cycles per tone (delay times tone spacing), in
        (0, 0.5); the window is centred on zero delay.

    Returns
    -------
    ndarray of float64, shape (tones, D)
        The eigenvectors of the kernel ``sin(2 pi width (k - l)) / (pi (k - l))`` with the
        ``D = round(2 width N) + 2`` largest eigenvalues (the Shannon number plus two), real.

    Notes
    -----
    Slepian, "Prolate spheroidal wave functions, Fourier analysis, and uncertainty - V: the
    discrete case", Bell Syst. Tech. J. 57(5), 1978; used for channel estimation by Zemen and
    Mecklenbraeuker, IEEE Trans. Signal Process. 53(9), 2005. Cached per tone set and width.
    """
    bins = np.asarray(tone_index, dtype=np.float64)
    key = (bins.tobytes(), float(width))
    found = _BASES.get(key)
    if found is not None:
        return found
    n = bins.size
    dim = min(n, int(round(2.0 * width * (bins.max() - bins.min() + 1))) + 2)
    diff = bins[:, None] - bins[None, :]
    with np.errstate(invalid="ignore", divide="ignore"):
        kernel = np.where(diff == 0, 2.0 * width,
                          np.sin(2 * np.pi * width * diff) / (np.pi * diff))
    _, vectors = eigh(kernel, subset_by_index=[n - dim, n - 1])
    if len(_BASES) >= 16:
        _BASES.clear()
    basis = _BASES[key] = np.ascontiguousarray(vectors[:, ::-1])
    return basis


def clarke_weights(doppler_x: float, window: int, ahead: np.ndarray,
                   ridge: float = _RIDGE) -> np.ndarray:
    """Linear minimum mean-square error prediction weights for a Clarke fading process.

    Parameters
    ----------
    doppler_x : float
        ``2 pi f_D dt``: the maximum Doppler shift times the sample interval, radians.
    window : int
        Samples the prediction uses, oldest first, one interval apart, the newest at lag 0.
    ahead : ndarray of float
        Lags to predict, in sample intervals after the newest.
    ridge : float
        Noise-to-signal ratio added to the diagonal (estimation noise; regularisation).

    Returns
    -------
    ndarray, shape (len(ahead), window)
        Row ``j``: weights ``w`` with ``w @ samples`` the prediction ``ahead[j]`` intervals on.

    Notes
    -----
    The Wiener-Hopf equations ``(R + ridge I) w = r`` with Clarke's autocorrelation
    ``R_ik = J0(doppler_x (i - k))`` (Jakes, "Microwave Mobile Communications", 1974) and
    ``r_i = J0(doppler_x (ahead + window - 1 - i))``; the method of Duel-Hallen, Hu and Hallen,
    "Long-range prediction of fading signals", IEEE Signal Process. Mag. 17(3), 2000.
    """
    lags = np.arange(window, dtype=np.float64)
    r_mat = j0(doppler_x * (lags[:, None] - lags[None, :]))
    r_mat[np.diag_indices(window)] += ridge
    ahead = np.asarray(ahead, dtype=np.float64)
    rhs = j0(doppler_x * (ahead[None, :] + (window - 1) - lags[:, None]))
    return np.linalg.solve(r_mat, rhs).T


class ChannelPredictor:
    """Predict each tone's complex channel over a horizon and bound its worst power.

    Parameters
    ----------
    horizon_s : float
        Far end of the horizon, seconds after the newest estimate (0: no prediction; the near end
        is one frame interval).
    window : int
        Estimates each prediction is made from.
    allowance_sigmas : float
        Measured prediction errors (beyond the one-frame error) subtracted from the predicted
        magnitude.
    error_tau_s : float
        Time constant of the prediction-error and Doppler trackers, seconds.
    pool_tones : int
        Neighbours each side over which the prediction error is pooled.
    floor_db : float
        The predicted worst SNR is not taken below ``-floor_db`` dB (a tone predicted to vanish
        falls to about that, so the result stays finite).
    delay_width : float
        Half-width of the channel's delay window, times the tone spacing (cycles per tone),
        around the delay centre: estimates are projected on the channels of that delay spread
        (:func:`band_basis`) before prediction; 0 turns the projection off.
    noise_tau_s : float
        Time constant of the per-tone noise variance smoothing, seconds.

    Notes
    -----
    The keyword arguments are the ``predict_*`` keys of the ``estimator:`` config section (the
    estimator owns one predictor). Deterministic and clock-free: time is the estimates' own.
    """

    def __init__(self, *, horizon_s: float = 0.0, window: int = 8,
                 allowance_sigmas: float = 0.5, error_tau_s: float = 1.0, pool_tones: int = 2,
                 floor_db: float = 10.0, delay_width: float = 0.075,
                 noise_tau_s: float = 0.1) -> None:
        check_values(locals(), PREDICTOR_LIMITS, prefix="predictor.")
        self.horizon_s = float(horizon_s)
        self.window = int(window)
        self.allowance_sigmas = float(allowance_sigmas)
        self.error_tau_s = float(error_tau_s)
        self.pool_tones = int(pool_tones)
        self.floor_db = float(floor_db)
        self.delay_width = float(delay_width)
        self.noise_tau_s = float(noise_tau_s)
        self._aligner: _Aligner | None = None
        self._tone_obj = None
        self.reset()

    def reset(self) -> None:
        """Forget all estimates (a new plan, a retune, a stale link)."""
        self._hist: np.ndarray | None = None   # (2 capacity, tones) complex, kept twice over
        self._pos = 0                           # slot of the newest row
        self._count = 0
        self._last_t = math.nan
        self._dt = math.nan
        self._err2 = None                       # (steps, tones) mean squared error per horizon
        self._err_n = 0
        self._noise = None                      # smoothed noise variance per tone
        self._last_noise = None                 # the newest estimate's
        self._bank = None                       # (candidates, window + steps) far-horizon errors
        self._bank_err = None                   # smoothed squared error of each candidate
        self._bank_n = 0
        self._choice = 0                        # index into _BANK_X in use
        self._x = math.nan                      # 2 pi f_D dt in use
        self._weights = None                    # (steps + 1, window) prediction weights
        self._errw = None                       # (steps, window + steps) error weights
        self._pred = None                       # (steps + 1, tones) predictions, row 0: now
        self._a_pow = None
        self._basis = None
        self._turn = None
        self._pool = None
        self._cache: dict = {}                  # results kept between estimates (_SLOW: a few)
        self._updates = 0

    # ------------------------------------------------------------------ input

    def update(self, time_s: float, channel: np.ndarray, tone_index: np.ndarray,
               noise_var: np.ndarray | None = None) -> None:
        """Take one channel estimate.

        Parameters
        ----------
        time_s : float
            When the channel was measured, seconds (increasing).
        channel : ndarray of complex
            Per-tone channel estimate (same tones every call; :meth:`reset` between plans).
        tone_index : ndarray of int
            The tones' signed FFT bins.
        noise_var : ndarray, optional
            Per-tone noise variance of the estimate (on the scale of ``|channel|**2``),
            smoothed for :meth:`worst_snr_db`.
        """
        h = np.array(channel, dtype=np.complex128)
        n = h.size
        # the pooled error and noise statistics move slowly (time constants of many frames):
        # made afresh every few estimates, the predictions on every one
        keep = self._updates % _POOL_EVERY != 0
        self._updates += 1
        self._cache = {k: v for k, v in self._cache.items() if k in _SLOW} if keep else {}
        if self._hist is not None and self._hist.shape[1] != n:
            self.reset()
        t = float(time_s)
        aligner = self._aligner
        if tone_index is not self._tone_obj and (
                aligner is None
                or aligner.key != np.asarray(tone_index, dtype=np.int64).tobytes()):
            aligner = self._aligner = _Aligner(tone_index)
            self._basis = None
        self._tone_obj = tone_index    # the same array next time needs no comparison
        if self._hist is None:
            self._cap = self.window + _MAX_STEPS + 2
            self._hist = np.empty((2 * self._cap, n), dtype=np.complex128)
            self._noise = None
        else:
            # Against the last estimate, not a prediction: where the whole band fades
            # together, a prediction heading through zero would turn the next estimate over.
            h = aligner.align(h, self._newest())
            dt = t - self._last_t
            self._dt = dt if math.isnan(self._dt) else 0.9 * self._dt + 0.1 * dt
        if self.delay_width > 0 and n > 8:
            h = self._project(h, tone_index, noise_var)
        if noise_var is not None:
            nv = self._last_noise = np.array(noise_var, dtype=np.float64)
            if self._noise is None or self._noise.shape != nv.shape or not self._dt > 0:
                self._noise = nv.copy()
            else:
                self._noise += -math.expm1(-self._dt / self.noise_tau_s) * (nv - self._noise)
        self._push(h)
        self._last_t = t
        if self._count >= 2:
            self._score()
        self._predict()

    def _project(self, h: np.ndarray, tone_index: np.ndarray,
                 noise_var: np.ndarray | None = None) -> np.ndarray:
        """``h`` projected on the channels of the delay window around its delay centre; a tone
        the projection moves by more than its noise variance keeps its own estimate."""
        if self._basis is None:
            self._basis = band_basis(tone_index, self.delay_width)
            self._basis_t = np.ascontiguousarray(self._basis.T)
            self._turn = None
        if self._turn is None or self._count % _CENTRE_EVERY == 0:
            # the delay centre: the lag-one correlation over neighbouring bins; the aligned
            # estimates keep it, so it is looked at again only now and then
            a = self._aligner
            c = np.vdot(h[a.lo], h[a.hi])
            nu = math.atan2(c.imag, c.real) if c != 0 else 0.0
            self._turn = np.exp(-a.minus_j_bins * nu)
            self._turn_back = np.conj(self._turn)
        g = h * self._turn_back
        pair = g.view(np.float64).reshape(-1, 2)       # (tones, re/im)
        g = (self._basis @ (self._basis_t @ pair)).view(np.complex128).ravel()
        g *= self._turn
        # a channel whose delays do not fit the window (or an estimate noisier than the
        # link's) loses more than a few % of its power here: then it is kept as it came
        rest = h - g
        if np.vdot(rest, rest).real > _PROJECTION_LOSS * np.vdot(h, h).real:
            return h
        if noise_var is not None:
            # Per tone: a channel estimate over N known symbols errs by about noise_var / N, so
            # a tone moved by more than noise_var is not denoised but misfitted: a step across
            # the band (a filter edge, a fade of a band of tones) that the delay window smears
            # over its neighbours, raising the tones inside the step by many dB. Those tones
            # keep their own estimate.
            rest = rest.view(np.float64).reshape(-1, 2)
            misfit = np.einsum("ij,ij->i", rest, rest) > noise_var
            if misfit.any():
                g[misfit] = h[misfit]
        return g

    def _push(self, h: np.ndarray) -> None:
        cap = self._cap
        self._pos = (self._pos + 1) % cap
        self._hist[self._pos] = h
        self._hist[self._pos + cap] = h
        self._count = min(self._count + 1, cap)

    def _newest(self) -> np.ndarray:
        return self._hist[self._pos + self._cap]

    def _block(self, m: int) -> np.ndarray:
        """The newest ``m`` estimates, oldest first (``m`` <= the kept count), one view."""
        end = self._pos + self._cap + 1
        return self._hist[end - m:end]

    def _steps(self) -> int:
        if not (self._dt > 0):
            return 1
        return min(_MAX_STEPS, max(1, int(math.ceil(self.horizon_s / self._dt - 1e-9))))

    def _refresh_weights(self, steps: int) -> None:
        """Make the filter bank (one row per candidate fading rate, the far horizon) and the
        chosen filter's weights for every horizon, when the horizon count or the choice moved."""
        w = self.window
        if self._bank is None or self._bank.shape[1] != w + steps:
            bank = np.zeros((_BANK_X.size, w + steps))
            bank[:, w + steps - 1] = 1.0
            for i, x in enumerate(_BANK_X):
                bank[i, :w] -= clarke_weights(float(x), w, np.array([float(steps)]))[0]
            self._bank = bank
            self._bank_err = np.zeros(_BANK_X.size)
            self._bank_power = 0.0
            self._bank_n = 0
        x = float(_BANK_X[self._choice])
        if self._weights is not None and self._weights.shape[0] == steps + 1 and x == self._x:
            return
        self._x = x
        self._weights = clarke_weights(x, w, np.arange(steps + 1, dtype=np.float64))
        # the error at horizon j of the newest estimate: newest - weights[j] @ the window
        # that ended j frames before it (over the newest window + steps estimates)
        err = np.zeros((steps, w + steps))
        for j in range(1, steps + 1):
            err[j - 1, w + steps - 1] = 1.0
            err[j - 1, steps - j:steps - j + w] -= self._weights[j]
        self._errw = err
        if self._err2 is not None and self._err2.shape[0] != steps:
            self._err2 = None

    def _choose(self, block: np.ndarray) -> None:
        """Score every candidate fading rate at the far horizon on the newest estimate; keep
        the one with the least smoothed error (another only when 10 % better)."""
        e = self._bank @ block                      # (candidates, 2 tones)
        e2 = np.einsum("ij,ij->i", e, e)
        self._bank_n += 1
        beta = max(-math.expm1(-self._dt / _CHOICE_TAU_S), 1.0 / self._bank_n)
        self._bank_err += beta * (e2 - self._bank_err)
        newest = block[-1]
        self._bank_power += beta * (float(newest @ newest) - self._bank_power)
        best = int(np.argmin(self._bank_err))
        if self._bank_err[best] < 0.9 * self._bank_err[self._choice]:
            self._choice = best

    def _score(self) -> None:
        steps = self._steps()
        self._refresh_weights(steps)
        w = self.window
        if self._count < w + steps:
            return
        block = self._block(w + steps).view(np.float64)     # (w + steps, 2 tones)
        if self._count % _CHOOSE_EVERY == 0 or self._bank_n == 0:
            self._choose(block)
            self._refresh_weights(steps)
        e2 = self._errw @ block                               # (steps, 2 tones)
        e2 *= e2                                              # real and imaginary parts apart
        if self._err2 is None:
            self._err2 = e2
            self._err_n = 1
        else:
            self._err_n += 1
            beta = max(-math.expm1(-self._dt / self.error_tau_s), 1.0 / self._err_n)
            e2 -= self._err2
            e2 *= beta
            self._err2 += e2

    def _predict(self) -> None:
        m = self._count
        if m < 2 or self._weights is None:
            self._pred = self._newest()[None, :].copy()
        else:
            w = self.window
            weights = self._weights
            if m < w:
                # too few estimates for the filter: hold the newest
                self._pred = np.repeat(self._newest()[None, :], weights.shape[0], axis=0)
            else:
                block = self._block(w).view(np.float64)
                self._pred = (weights @ block).view(np.complex128)
        self._a_pow = None

    def restart(self, tones: np.ndarray) -> None:
        """Start the prediction of ``tones`` (a boolean mask) afresh at their newest estimate:
        the kept estimates of those tones take its value, so the prediction holds it until new
        estimates arrive (for a step of the channel, which is no trend); where their newest
        noise variance is above the smoothed one, the smoothed one takes it (a step of the
        noise: an interferer that came; one that went is left to the smoothing).

        Parameters
        ----------
        tones : ndarray of bool
            Which tones.
        """
        if self._hist is None or self._count == 0:
            return
        mask = np.asarray(tones, dtype=bool)
        block = self._block(self._count)
        np.copyto(block[:-1], block[-1], where=mask)
        if self._noise is not None and self._last_noise is not None:
            np.copyto(self._noise, self._last_noise, where=mask & (self._last_noise > self._noise))
        cap = self._cap
        start = self._pos + cap + 1 - self._count
        for i in range(start, start + self._count):
            self._hist[(i + cap) % (2 * cap)] = self._hist[i]
        self._cache.clear()
        self._predict()

    # ------------------------------------------------------------------ output

    @property
    def frame_interval_s(self) -> float:
        """The smoothed interval between estimates, seconds (NaN before the second)."""
        return self._dt

    @property
    def doppler_hz(self) -> float:
        """The fading rate the prediction assumes, Hz (NaN before two estimates)."""
        if not self._dt > 0 or self._count < 2:
            return math.nan
        return float(_BANK_X[self._choice]) / (2 * math.pi * self._dt)

    @property
    def far_error(self) -> float:
        """The chosen filter's mean squared error at the far end of the horizon relative to
        the channel's power (0: perfect; about 1 or more: no better than knowing nothing; NaN
        before it is measured)."""
        if self._bank_err is None or not self._bank_n or not self._bank_power > 0:
            return math.nan
        return float(self._bank_err[self._choice]) / self._bank_power

    def predict(self, ahead_s: float) -> np.ndarray | None:
        """The predicted complex channel ``ahead_s`` after the newest estimate (None before
        the first), in the phase of the newest (aligned) estimate."""
        if self._pred is None:
            return None
        if self._count < max(2, self.window) or self._weights is None or not self._dt > 0:
            return self._newest().copy()
        steps = float(ahead_s) / self._dt
        k = int(round(steps))
        if abs(steps - k) < 1e-6 and k < self._weights.shape[0]:
            return self._pred[k].copy()      # a whole number of frames: already predicted
        row = clarke_weights(self._x, self.window, np.array([steps]))[0]
        block = self._block(self.window).view(np.float64)
        return (row @ block).view(np.complex128)

    def _present_power(self) -> np.ndarray:
        if self._a_pow is None:
            a = self._pred[0]
            self._a_pow = a.real * a.real + a.imag * a.imag
        return self._a_pow

    def change_db(self, ahead_s: float, noise_var: np.ndarray) -> np.ndarray | None:
        """Per tone: the predicted power ``ahead_s`` after the newest estimate relative to the
        predicted present power, dB (no allowance; powers floored as in :meth:`fall_db`); None
        before two estimates."""
        if self._pred is None or self._count < 2 or not math.isfinite(ahead_s):
            return None
        floor = np.asarray(noise_var, dtype=np.float64) * 10.0 ** (-self.floor_db / 10.0)
        ahead = self.predict(ahead_s)
        power = ahead.real * ahead.real + ahead.imag * ahead.imag
        power += floor
        now = self._present_power() + floor
        power /= now
        np.log10(power, out=power)
        power *= 10.0
        return power

    def allowance(self) -> np.ndarray | None:
        """Per horizon of 1, 2, ... frames (rows) and tone: the RMS prediction error beyond the
        one-frame error, pooled over neighbours (None until measured)."""
        if self._err2 is None:
            return None
        found = self._cache.get("allowance")
        if found is not None:
            return found.copy()
        e2 = self._err2                       # (steps, 2 tones): real and imaginary parts
        steps, n2 = e2.shape
        lo, hi, count = self._pool_plan(n2 // 2)
        c = np.empty((steps, n2 + 1))
        c[:, 0] = 0.0
        np.cumsum(e2, axis=1, out=c[:, 1:])
        # per tone, the sum over its window of tones (both parts), over the tones in it
        e2 = c[:, hi]
        e2 -= c[:, lo]
        e2 /= count
        out = np.subtract(e2, e2[0])
        np.maximum(out, 0.0, out=out)
        np.sqrt(out, out=out)
        self._cache["allowance"] = out
        return out.copy()

    def _pool_plan(self, n: int) -> tuple:
        """Column indices into the running sum over interleaved (real, imaginary) errors that
        give each tone's window of ``pool_tones`` neighbours either side (clipped at the band
        edges), and the tones in each window."""
        plan = self._pool
        if plan is None or plan[2].size != n:
            k = np.arange(n)
            first = np.maximum(k - self.pool_tones, 0)
            last = np.minimum(k + self.pool_tones, n - 1)
            plan = self._pool = (2 * first, 2 * last + 2, (last - first + 1).astype(np.float64))
        return plan

    def _worst_power(self) -> np.ndarray | None:
        if self.horizon_s <= 0 or self._pred is None or self._count < 2 or not self._dt > 0:
            return None
        steps = min(self._steps(), self._pred.shape[0] - 1)
        if steps < 1:
            return self._present_power().copy()
        path = self._pred[1:steps + 1]
        mag = np.abs(path)
        allow = self.allowance()
        if allow is not None and self.allowance_sigmas > 0:
            k = min(allow.shape[0], steps)
            mag[:k] -= self.allowance_sigmas * allow[:k]
            if k < steps:
                mag[k:] -= self.allowance_sigmas * allow[k - 1]
            np.maximum(mag, 0.0, out=mag)
        np.square(mag, out=mag)
        return mag.min(axis=0)

    def fall_db(self, noise_var: np.ndarray) -> np.ndarray | None:
        """Per tone: the worst predicted power over the horizon, less the allowance, relative to
        the predicted present power, dB (0 or below).

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
        if not self.far_error < PREDICTABLE_ERROR:
            return None
        worst = self._worst_power()
        if worst is None:
            return None
        floor = np.asarray(noise_var, dtype=np.float64) * 10.0 ** (-self.floor_db / 10.0)
        worst += floor
        worst /= self._present_power() + floor
        np.log10(worst, out=worst)
        worst *= 10.0
        return np.minimum(worst, 0.0, out=worst)

    def _noise_floor(self) -> np.ndarray:
        """The smoothed noise variance per tone, at least the mean over ``NOISE_POOL_TONES``
        neighbours either side: noise (and interference) is a floor across the band with
        peaks, not dips; a tone whose own estimate sits far below its neighbours was
        estimated from wrong decisions (a data-aided fit on a frame that failed there)."""
        found = self._cache.get("noise")
        if found is not None:
            return found
        nv = self._noise
        n = nv.size
        w = min(NOISE_POOL_TONES, (n - 1) // 2)
        if w < 1:
            return nv.copy()
        c = np.empty(n + 2 * w + 1)
        c[0] = 0.0
        c[1:w + 1] = nv[0]
        c[w + 1:w + 1 + n] = nv
        c[w + 1 + n:] = nv[-1]
        np.cumsum(c, out=c)
        pooled = c[2 * w + 1:] - c[:n]
        pooled /= 2 * w + 1
        self._cache["noise"] = found = np.maximum(pooled, nv, out=pooled)
        return found

    def worst_snr_db(self) -> np.ndarray | None:
        """Per tone: the worst predicted SNR over the horizon, less the allowance, dB, on the
        smoothed noise variance given to :meth:`update` (floored at ``-floor_db``); None with
        prediction off, without noise variances, or while the channel is not predictable over
        the horizon (:attr:`far_error` not below ``PREDICTABLE_ERROR``, and before it is
        measured)."""
        if self._noise is None or not self.far_error < PREDICTABLE_ERROR:
            return None
        worst = self._worst_power()
        if worst is None:
            return None
        worst /= self._noise_floor()   # a fresh array: the floor is kept
        worst += 10.0 ** (-self.floor_db / 10.0)
        np.log10(worst, out=worst)
        worst *= 10.0
        return worst
