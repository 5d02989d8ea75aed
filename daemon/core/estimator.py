"""Per-tone SNR tracking: smoothing in time and across tones, outlier gating, uncertainty.

:class:`Estimator` is a small state object fed one :class:`~brimline.daemon.records.Estimate`
at a time. It never reads a clock: the smoothing runs on the estimates' own ``time_s`` (when the
channel was measured), and the age of the tracking on the caller's ``now_s``. Its output,
:class:`~brimline.daemon.records.Tracked`, is what change control loads bits on.

Per tone and per accepted frame, with ``x`` the frame's SNR in dB and ``m`` the tracked value::

    alpha = 1 - exp(-dt / tau_s)           dt: time since the last accepted frame
    d     = x - m                          innovation
    |d| > max(outlier_db, outlier_sigmas * std)  -> outlier, held back (see below)
    m    += alpha * d
    var   = (1 - beta) var + beta * d**2 * (2 - alpha) / 2,   beta = 1 - exp(-dt / std_tau_s)
                                                      (at least 1 / frames so far, at start)
    P     = (1 - alpha)**2 P + alpha**2 var          variance of m itself
    effective = m - backoff_sigmas * sqrt(var + P)

Why these choices:

* **Smoothing in dB.** An SNR estimate is a ratio of two noisy powers; its error is close to
  multiplicative, so in dB it is nearly additive with a spread that does not depend on the SNR
  level. Averaging in dB gives one meaningful per-tone standard deviation for gating and
  back-off, and outlier gates in dB are scale-free. The cost is the geometric rather than
  arithmetic mean: lower by about ``ln(10)/20 * std_db**2`` dB (0.12 dB at 1 dB spread), a bias on
  the safe side for loading.
* **alpha from the time step** makes the smoother a sampled first-order low-pass with time
  constant ``tau_s`` whatever the frame spacing: one frame after a gap of ``k`` frame times has
  exactly the effect of ``k`` frames of the same value, and after a gap of several ``tau_s`` the old
  state is all but forgotten. Beyond ``stale_s`` tracking starts afresh (the variance too).
* **Variance of the innovation**, corrected by ``(2 - alpha) / 2``: with iid noise of variance
  sigma**2 around a constant, the EWMA itself has variance ``sigma**2 * alpha / (2 - alpha)``,
  so ``E[d**2] = 2 sigma**2 / (2 - alpha)``. ``std_db`` is thus the spread of a single frame's
  SNR about the tracked value (estimation noise plus fast channel variation): the amount by which
  the SNR the transmitter meets can differ from the tracked one, hence the back-off. ``P`` adds the
  uncertainty of the tracked value itself, large right after the first frame (as large as
  ``std_init_db``) and small once many frames are averaged, so a map made from the first few
  frames is made with a wider back-off and does not need repairs as the average settles.
* **Outliers**: a tone outside its gate is not smoothed in but held as *pending*. When
  ``confirm_frames`` consecutive frames deviate on the same side and agree with each other (within
  the gate), the change is real and the tone jumps to their mean, so a deep sudden drop reaches
  change control after exactly ``confirm_frames`` frames. A frame with more than
  ``frame_outlier_fraction`` of its tones outside their gates (impulse noise, a clipped frame) is a
  whole-frame outlier: no tone is smoothed with it, but its pending evidence counts, so a real
  drop of the whole band still gets through after ``confirm_frames`` frames. After a gap of
  ``tau_s * ln 2`` or more the new frame outweighs the old state, which says little about it any
  more, so no gate applies.
* **Across tones**, the tracked values are averaged with pairs of neighbours (one each side, up to
  ``tone_window`` tones away) only where both agree within ``tone_agree_db`` (a symmetric sigma
  filter): a notch or an interferer deeper than that stays intact; a shallower one cannot be
  told from estimation noise and is flattened by at most ``2/3 * tone_agree_db`` with a window
  of one tone each side (``4/5 * tone_agree_db`` with two). Pairs keep a linear slope unbiased.

* **Lag-driven gain** (``lag_sigmas > 0``): a fixed ``tau_s`` cannot both average a static
  channel's noise and follow a Rayleigh fade. The innovations' short-term mean ``u`` (EWMA with
  time constant ``tau_min_s``) is pooled over ``2 * LAG_POOL_TONES + 1`` tones; under noise alone
  it has variance ``var * a_u / (2 - a_u) / count``, so ``z`` is its size in those spreads. A fade
  moves neighbouring tones the same way frame after frame; noise does not. Where
  ``z > lag_sigmas`` the time constant is ``tau_s * (lag_sigmas / z)**2`` (at least
  ``tau_min_s``), per tone and frame. A deviation beyond the gate in the direction of a fade
  already under way (``z > 2 * lag_sigmas`` before this frame) is not held as an outlier.
* **Optional slope** (``trend_tau_s > 0``, Holt's linear trend): the innovation is taken
  against ``m + slope * h`` with ``h = min(dt, tau_s)``; the slope gains ``alpha * gamma / dt``
  per dB of innovation, ``gamma = 1 - exp(-dt / trend_tau_s)``. The level, its covariance with the
  slope and the slope's variance are propagated together (Joseph form for the fixed gains), and
  the innovation variance is corrected by ``var / (var + predicted variance)``, which for the
  plain smoother in steady state is the ``(2 - alpha) / 2`` above. The gate is
  ``max(outlier_db, outlier_sigmas * sqrt(var + predicted variance))``. It is off by default:
  with it, the estimation noise of a static channel moves the slope and the maps churn.

* **Channel prediction** (``predict_s > 0``): a map made now is in force from the next frames
  on for at least the shortest map life, so on a fading channel the SNR it meets is not
  today's. A :class:`~brimline.daemon.core.predictor.ChannelPredictor` follows each tone's
  *complex* channel (a path through a notch stays smooth there, where a fit in dB or in power
  does not). Where the estimates' channel and noise variance give their SNR (checked on the
  first frame of each tracking; a real receiver's do), the effective SNR *is* the predictor's
  worst predicted SNR over ``predict_s`` (predicted channel, less ``predict_sigmas`` measured
  prediction errors, over the noise variance smoothed in time and floored by its neighbours):
  the dB smoothing above lags a fade and carries the per-frame noise of the noise estimate,
  which the channel and a slowly moving noise floor do not. Tones holding back an outlier keep
  the plain view, and a confirmed jump restarts that tone's prediction (a step is no trend).
  ``Tracked.predicted_s`` then says so, and change control does not extrapolate again. While
  the channel is not predictable over the horizon (fading faster than a fraction of it: the
  predictor's measured far-horizon error above half the channel's power; also in the first
  frames, before that is measured) the plain view serves. Sources that send only an SNR (a
  channel of ones) get the plain view throughout, lowered by the predicted relative fall
  (``var`` is then replaced by the smaller of itself and the spread of the frames about what
  the prediction expected one frame ahead), which a channel that does not move leaves at 0.

Frames that cannot be used are dropped and counted by reason (see :data:`REJECT_REASONS`); the
state stays as it was.
"""

from __future__ import annotations

import math
from types import MappingProxyType

import numpy as np

from brimline.daemon.core.predictor import PREDICTOR_LIMITS, ChannelPredictor
from brimline.daemon.limits import NON_NEGATIVE, POSITIVE, between, check_values
from brimline.daemon.records import Estimate, Tracked

__all__ = ["Estimator", "ESTIMATOR_LIMITS", "REJECT_REASONS"]

#: Half-width in tones of the pooling of innovations that detects lag (see ``lag_sigmas``).
LAG_POOL_TONES = 4

#: The limit of each keyword argument of :class:`Estimator`, checked by the constructor and by
#: the ``estimator:`` config section alike (the defaults are the constructor's own).
ESTIMATOR_LIMITS = MappingProxyType({
    "tau_s": POSITIVE,
    "std_tau_s": POSITIVE,
    "std_init_db": POSITIVE,
    "backoff_sigmas": NON_NEGATIVE,
    "outlier_db": POSITIVE,
    "outlier_sigmas": NON_NEGATIVE,
    "confirm_frames": between(1, 100),
    "frame_outlier_fraction": between(0, 1, low_open=True),
    "stale_s": POSITIVE,
    "tone_window": between(0, 16),
    "tone_agree_db": NON_NEGATIVE,
    "trend_tau_s": NON_NEGATIVE,
    "lag_sigmas": NON_NEGATIVE,
    "tau_min_s": POSITIVE,
    "predict_s": PREDICTOR_LIMITS["horizon_s"],
    "predict_window": PREDICTOR_LIMITS["window"],
    "predict_sigmas": PREDICTOR_LIMITS["allowance_sigmas"],
    "predict_delay_width": PREDICTOR_LIMITS["delay_width"],
})

_min = np.minimum.reduce
_accumulate = np.add.accumulate
#: Zero vectors by length, for :func:`_all_finite` (read-only, shared).
_ZEROS: dict[int, np.ndarray] = {}


def _all_finite(*arrays: np.ndarray) -> bool:
    """Whether every element of some 1-D float arrays is finite: an array's dot product with
    zeros is 0 exactly then, and NaN as soon as one element is NaN or infinite (``inf * 0``
    is NaN). One BLAS call per array instead of ``isfinite`` and a reduction, or a float64
    sum of float32 values: this runs per frame."""
    with np.errstate(invalid="ignore"):   # inf * 0 is the answer here, not a warning
        for values in arrays:
            zeros = _ZEROS.get(values.size)
            if zeros is None or zeros.dtype != values.dtype:
                zeros = np.zeros(values.size, dtype=values.dtype)
                zeros.setflags(write=False)
                _ZEROS[values.size] = zeros
            if not values.dot(zeros) == 0.0:
                return False
    return True

#: Reasons :meth:`Estimator.update` can return, each also a key of :attr:`Estimator.counters`.
REJECT_REASONS = (
    "invalid",        # the source marked the frame unusable (valid=False)
    "non_finite",     # NaN or inf in snr_db, noise_var, channel or time_s
    "noise_var",      # a non-positive noise variance
    "tone_count",     # another number of tones than the tracked plan
    "tone_index",     # same count, other tones
    "time_order",     # time_s not after the previous frame's
    "frame_outlier",  # most tones outside their gates at once
)


class Estimator:
    """Track per-tone SNR, its uncertainty and the effective SNR for loading.

    Parameters
    ----------
    tau_s : float
        Time constant of the exponential smoothing in time, seconds.
    std_tau_s : float
        Time constant of the variance tracker, seconds.
    std_init_db : float
        Standard deviation (dB) assumed for a tone before its variance is learnt.
    backoff_sigmas : float
        The effective SNR is the smoothed SNR minus this many standard deviations.
    outlier_db : float
        Smallest outlier gate, dB.
    outlier_sigmas : float
        Outlier gate in standard deviations (the wider of the two gates applies).
    confirm_frames : int
        Consecutive agreeing outlier frames that make a change real.
    frame_outlier_fraction : float
        Fraction of tones outside their gates above which a frame is a whole-frame outlier.
    stale_s : float
        Gap between accepted frames after which tracking starts afresh, seconds.
    tone_window : int
        Half-width in tones of the smoothing across neighbours; 0 turns it off.
    tone_agree_db : float
        Neighbours are averaged in only where within this of the tone, dB.
    lag_sigmas : float
        Lag-driven gain: where the innovations' short-term mean, pooled over neighbouring tones,
        stands ``z`` noise spreads off zero with ``z > lag_sigmas``, the smoothing time constant
        becomes ``tau_s * (lag_sigmas / z)**2``; 0 turns it off.
    tau_min_s : float
        Shortest time constant of the lag-driven gain, and the time constant of the
        innovations' short-term mean, seconds.
    trend_tau_s : float
        Time constant of the per-tone slope tracker (Holt's linear trend), seconds; 0 turns it
        off. With it on the tracked value is predicted ``slope * min(dt, tau_s)`` ahead before
        the innovation is taken, so a steady fade is followed without lag.
    predict_s : float
        Horizon of the per-tone complex channel prediction, seconds after the newest estimate
        (a map's shortest life, ``1 / change.max_maps_per_s``, its first frame one frame
        interval on); each tone is loaded on its worst predicted SNR over it; 0 turns it off.
    predict_window : int
        Estimates each prediction is made from.
    predict_sigmas : float
        Measured prediction errors (beyond the one-frame error) taken off the predicted channel
        magnitude.
    predict_delay_width : float
        Half-width of the channel's delay window times the tone spacing, cycles per tone:
        estimates are projected on the channels of that delay spread before prediction
        (:func:`~brimline.daemon.core.predictor.band_basis`); 0 turns it off.

    Notes
    -----
    The keyword arguments are exactly the keys of the ``estimator:`` config section
    (:class:`brimline.daemon.runtime.config.EstimatorSection`). Their defaults here are the only
    ones: the config section takes its defaults from this signature, and their limits from
    :data:`ESTIMATOR_LIMITS`.

    Examples
    --------
    >>> est = Estimator()
    >>> est.tracked(0.0) is None
    True
    """

    def __init__(self, *, tau_s: float = 0.1, std_tau_s: float = 1.0, std_init_db: float = 3.0,
                 backoff_sigmas: float = 1.0, outlier_db: float = 6.0,
                 outlier_sigmas: float = 4.0, confirm_frames: int = 3,
                 frame_outlier_fraction: float = 0.5, stale_s: float = 5.0,
                 tone_window: int = 2, tone_agree_db: float = 2.0,
                 trend_tau_s: float = 0.0, lag_sigmas: float = 2.0,
                 tau_min_s: float = 0.015, predict_s: float = 0.1,
                 predict_window: int = 8, predict_sigmas: float = 0.5,
                 predict_delay_width: float = 0.075) -> None:
        # locals() holds exactly the keyword arguments here, before any other name is bound.
        check_values(locals(), ESTIMATOR_LIMITS, prefix="estimator.")
        self.tau_s = float(tau_s)
        self.std_tau_s = float(std_tau_s)
        self.std_init_db = float(std_init_db)
        self.backoff_sigmas = float(backoff_sigmas)
        self.outlier_db = float(outlier_db)
        self.outlier_sigmas = float(outlier_sigmas)
        self.confirm_frames = int(confirm_frames)
        self.frame_outlier_fraction = float(frame_outlier_fraction)
        self.stale_s = float(stale_s)
        self.tone_window = int(tone_window)
        self.tone_agree_db = float(tone_agree_db)
        self.trend_tau_s = float(trend_tau_s)
        self.lag_sigmas = float(lag_sigmas)
        self.tau_min_s = float(tau_min_s)
        self.predict_s = float(predict_s)
        self.predict_window = int(predict_window)
        self.predict_sigmas = float(predict_sigmas)
        self.predict_delay_width = float(predict_delay_width)
        self._predictor = ChannelPredictor(horizon_s=self.predict_s, window=self.predict_window,
                                           allowance_sigmas=self.predict_sigmas,
                                           delay_width=self.predict_delay_width)
        self._counters = dict.fromkeys(
            ("accepted",) + REJECT_REASONS
            + ("tone_outliers", "tone_changes", "reset_plan", "reset_tuning", "reset_stale",
               "reset_other"), 0)
        self.last_reset_reason = ""
        self._clear()

    # ------------------------------------------------------------------ state

    def _clear(self) -> None:
        self._plan_id: str | None = None
        self._tones = None
        self._tone_bytes = b""         # the tracked tone indices as bytes: one compare a frame
        self._center_hz = math.nan
        self._frames = 0
        self._time_s = math.nan        # source time of the last accepted frame
        self._seen_s = math.nan        # source time of the last frame used in any way
        self._accepted_now_s = math.nan
        self._mean_db = None
        self._var_db2 = None
        self._p11 = self._p12 = self._p22 = None
        self._slope_db_s = None
        self._lag_db = None
        self._pend_sum = None
        self._pend_n = None
        self._pend_sign = None
        self._pending = False          # some tone holds pending outlier evidence
        self._noise_var = None
        self._expect_db = None   # this frame's SNR as the channel prediction expected it
        self._explained = False  # the estimates' channel and noise give their SNR
        self._inert = False      # the estimates carry no channel to predict
        self._var_moving_db2 = None  # spread of single frames about that expectation
        self._predictor.reset()

    def _seed(self, estimate: Estimate, now_s: float) -> None:
        x = estimate.snr_db.astype(np.float64)
        n = x.size
        self._plan_id = estimate.plan_id
        self._tones = estimate.tone_index
        self._tone_bytes = estimate.tone_index.tobytes()
        self._center_hz = estimate.center_hz
        self._mean_db = x.copy()
        self._var_db2 = np.full(n, self.std_init_db ** 2)
        self._p11 = self._var_db2.copy()   # variance of the tracked level
        self._p12 = np.zeros(n)            # its covariance with the slope
        self._p22 = np.zeros(n)            # variance of the slope
        self._slope_db_s = np.zeros(n)
        self._lag_db = np.zeros(n)         # short-term mean of the innovations
        w = self._pool_w = min(LAG_POOL_TONES, max(n - 1, 0) // 2)
        c = np.zeros(n + 1 + 2 * w)
        # Views of the running-sum buffer used by _window_sum, made once per seed.
        self._cumsum_views = (c[w + 1:w + 1 + n], c[w + 1 + n:], c[2 * w + 1:], c[:n])
        self._lag_gain = 1.0
        self._pend_sum = np.zeros(n)
        self._pend_n = np.zeros(n, dtype=np.int64)
        self._pend_sign = np.zeros(n)
        self._pending = False
        self._frames = 1
        self._time_s = self._seen_s = estimate.time_s
        self._accepted_now_s = float(now_s)
        self._predict(estimate)

    def _predict(self, estimate: Estimate) -> None:
        if self.predict_s > 0:
            p = self._predictor
            if self._frames == 1:
                self._explained = _explains(estimate)
                # a source that sends no channel (the same value on every tone) has nothing to
                # predict: its predicted change and fall are 0, without the predictor's work
                channel = estimate.channel
                self._inert = not self._explained and bool(np.all(channel == channel[0]))
            self._noise_var = estimate.noise_var
            if self._var_moving_db2 is None:
                self._var_moving_db2 = self._var_db2.copy()
            if self._inert:
                self._expect_db = self._mean_db.copy() if self._frames > 1 else None
                return
            p.update(estimate.time_s, estimate.channel, estimate.tone_index,
                     estimate.noise_var if self._explained else None)
            # the spread about the one-frame prediction serves the relative fall only
            change = (None if self._explained
                      else p.change_db(p.frame_interval_s, estimate.noise_var))
            self._expect_db = None if change is None else self._mean_db + change

    def reset(self, reason: str = "other") -> None:
        """Forget all tracking; the next valid frame starts afresh.

        Parameters
        ----------
        reason : str
            ``"plan"``, ``"tuning"``, ``"stale"`` or anything else (counted as ``reset_other``);
            kept in :attr:`last_reset_reason`.
        """
        key = f"reset_{reason}" if reason in ("plan", "tuning", "stale") else "reset_other"
        self._counters[key] += 1
        self.last_reset_reason = str(reason)
        self._clear()

    @property
    def counters(self) -> dict[str, int]:
        """Counts since construction: ``accepted``, each reject reason, ``tone_outliers`` (tone
        values held back), ``tone_changes`` (confirmed jumps) and resets by reason."""
        return dict(self._counters)

    # ------------------------------------------------------------------ input

    def _reject(self, reason: str) -> str:
        self._counters[reason] += 1
        return reason

    def _check(self, estimate: Estimate) -> str | None:
        if not estimate.valid:
            return "invalid"
        if not (math.isfinite(estimate.time_s)
                and _all_finite(estimate.snr_db, estimate.noise_var,
                                estimate.channel.view(np.float32))):
            return "non_finite"
        if estimate.noise_var.size and not _min(estimate.noise_var) > 0:
            return "noise_var"
        return None

    def update(self, estimate: Estimate, now_s: float) -> str | None:
        """Feed one frame.

        Parameters
        ----------
        estimate : Estimate
            The frame; its ``time_s`` drives the smoothing.
        now_s : float
            The caller's clock, seconds; :attr:`Tracked.age_s` is measured on it.

        Returns
        -------
        str or None
            None when the frame was used, else the reason it was dropped (one of
            :data:`REJECT_REASONS`, also counted in :attr:`counters`).
        """
        reason = self._check(estimate)
        if reason is not None:
            return self._reject(reason)
        if self._plan_id is not None:
            if estimate.plan_id != self._plan_id:
                self.reset("plan")
            elif not _same_tuning(estimate.center_hz, self._center_hz):
                self.reset("tuning")
            elif estimate.n_tones != self._tones.size:
                return self._reject("tone_count")
            elif estimate.tone_index.tobytes() != self._tone_bytes:  # same count and dtype
                return self._reject("tone_index")
            elif not estimate.time_s > self._seen_s:
                return self._reject("time_order")
            elif estimate.time_s - self._time_s > self.stale_s:
                self.reset("stale")
        if self._plan_id is None:
            self._seed(estimate, now_s)
            self._counters["accepted"] += 1
            return None
        return self._smooth(estimate, now_s)

    def _smooth(self, estimate: Estimate, now_s: float) -> str | None:
        dt = estimate.time_s - self._time_s
        alpha = -math.expm1(-dt / self.tau_s)
        if self.trend_tau_s > 0:
            # Holt's linear trend: the slope gain is gamma per unit level change per dt.
            gamma = -math.expm1(-dt / self.trend_tau_s)
            k2 = alpha * gamma / dt
            # Extrapolate at most tau_s ahead: after a long gap the slope says little.
            horizon = min(dt, self.tau_s)
        else:
            gamma = k2 = horizon = 0.0
        # Until the variance window is full, a plain running mean over the frames so far (the
        # prior std_init_db counting as one frame): the spread is learnt within a few frames.
        beta = max(-math.expm1(-dt / self.std_tau_s), 1.0 / (self._frames + 1))
        x = estimate.snr_db.astype(np.float64)
        if self._expect_db is not None:
            # the spread of a frame about what the channel prediction expected: the part of
            # the frames' spread (var) that the prediction does not explain
            miss = x - self._expect_db
            miss *= miss
            self._var_moving_db2 += beta * (miss - self._var_moving_db2)
        slope = self._slope_db_s
        if k2:
            pred = slope * horizon
            pred += self._mean_db
            # Covariance of the prediction: F P F^T with F = [[1, h], [0, 1]].
            s11 = self._p11 + horizon * (2.0 * self._p12 + horizon * self._p22)
            s12 = self._p12 + horizon * self._p22
            s22 = self._p22
        else:
            pred = self._mean_db
            s11, s12, s22 = self._p11, self._p12, self._p22
        d = x - pred
        var = self._var_db2
        var_s11 = var + s11     # the gate's and the variance correction's sum
        gate = np.sqrt(var_s11)
        gate *= self.outlier_sigmas
        np.maximum(gate, self.outlier_db, out=gate)
        if alpha < 0.5:
            out = np.abs(d) > gate
            n_out = int(np.count_nonzero(out))
            if n_out and self.lag_sigmas > 0 and self._frames > 1:
                # A deviation in the direction a fade already under way moves this tone and
                # its neighbours (seen in the frames before this one) is the fade, not an outlier.
                # Twice the lag threshold: noise alone gets there about once in 10**4 tones.
                pooled, z2 = self._lag_z2()
                out &= ~((z2 > 4.0 * self.lag_sigmas ** 2) & (pooled * d > 0))
                n_out = int(np.count_nonzero(out))
        else:  # after a gap of tau_s * ln 2 or more the new frame outweighs the old state
            n_out = 0
        self._seen_s = estimate.time_s
        if n_out == 0:
            confirmed = None
            if self._pending:
                self._pend_n[:] = 0
                self._pending = False
        else:
            sign = np.sign(d)
            pend_n = self._pend_n
            with np.errstate(invalid="ignore", divide="ignore"):
                pend_mean = self._pend_sum / pend_n
            agree = out & (pend_n > 0) & (sign == self._pend_sign) & \
                (np.abs(x - pend_mean) <= gate)
            new_n = np.where(out, np.where(agree, pend_n + 1, 1), 0)
            new_sum = np.where(out, np.where(agree, self._pend_sum + x, x), 0.0)
            confirmed = new_n >= self.confirm_frames
            n_confirmed = int(np.count_nonzero(confirmed))
            self._pend_n = np.where(confirmed, 0, new_n)
            self._pending = True
            self._pend_sum = np.where(confirmed, 0.0, new_sum)
            self._pend_sign = sign
            self._counters["tone_outliers"] += n_out - n_confirmed
            if n_out - n_confirmed > self.frame_outlier_fraction * x.size:
                # Used only as evidence for pending changes; time keeps running from the last
                # accepted frame, so the next good frame covers the whole interval.
                return self._reject("frame_outlier")
            self._counters["tone_changes"] += n_confirmed
            confirmed_mean = np.where(confirmed, new_sum / np.maximum(new_n, 1), 0.0)
            d[out] = 0.0
        if self.lag_sigmas > 0 and alpha < 0.5:
            alpha = self._adapt_gain(d, dt)
        # Innovation variance, less the part the prediction's own spread explains (see module
        # notes). Held-back tones keep their variance (d is 0 there) and follow the prediction.
        new_var = d * d
        new_var *= var / var_s11
        new_var *= beta
        new_var += (1.0 - beta) * var
        # Covariance of the tracked level and slope after the update (Joseph form, gain
        # K = [alpha, k2]): (I - K H) S (I - K H)^T + K K^T var.
        p11 = s11 * (1.0 - alpha) ** 2
        p11 += alpha * alpha * new_var
        if k2:
            p12 = (1.0 - alpha) * (s12 - k2 * s11) + alpha * k2 * new_var
            p22 = s22 - 2.0 * k2 * s12 + k2 * k2 * (s11 + new_var)
        else:
            p12, p22 = s12, s22
        if n_out:
            keep = ~out
            np.copyto(var, new_var, where=keep)
            self._p11 = np.where(keep, p11, s11)
            self._p12 = np.where(keep, p12, s12)
            self._p22 = np.where(keep, p22, s22)
        else:
            self._var_db2 = new_var
            self._p11, self._p12, self._p22 = p11, p12, p22
        if k2:
            slope = slope + k2 * d
            mean = pred + alpha * d
        else:
            mean = pred + alpha * d
        if confirmed is not None and n_confirmed:
            np.copyto(mean, confirmed_mean, where=confirmed)
            # As uncertain as a fresh seed: the wider back-off right after a big change keeps
            # the map made on it from needing repairs as the new level settles.
            np.copyto(self._p11, self._var_db2, where=confirmed)
            if k2:
                slope = np.where(confirmed, 0.0, slope)
                self._p12 = np.where(confirmed, 0.0, self._p12)
                self._p22 = np.where(confirmed, 0.0, self._p22)
        self._mean_db = mean
        self._slope_db_s = slope
        self._time_s = estimate.time_s
        self._accepted_now_s = float(now_s)
        self._frames += 1
        self._counters["accepted"] += 1
        self._predict(estimate)
        if self.predict_s > 0 and confirmed is not None and n_confirmed:
            # a confirmed jump is a step, not a trend: those tones' lines start at the new level
            self._predictor.restart(confirmed)
        return None

    def _lag_z2(self) -> tuple[np.ndarray, np.ndarray]:
        """The innovations' short-term mean pooled over neighbouring tones (times the count)
        and its square in units of its variance under noise alone (``z**2``)."""
        pooled = self._window_sum(self._lag_db)      # count * pooled mean
        noise = self._window_sum(self._var_db2)      # count * pooled variance
        noise *= self._lag_gain / (2.0 - self._lag_gain)   # EWMA variance of iid noise
        # z**2 = (pooled / count)**2 / (noise / count / count) = pooled**2 / noise
        z2 = pooled * pooled
        z2 /= noise
        return pooled, z2

    def _window_sum(self, values: np.ndarray) -> np.ndarray:
        """Sum over each tone's pooling window (clipped at the band edges), by a running sum
        padded with ``w`` zeros in front and ``w`` copies of the total behind."""
        body, tail, ahead, behind = self._cumsum_views
        _accumulate(values, out=body)   # ndarray.cumsum, without its method wrapper
        if tail.size:
            tail.fill(body[-1])
        return ahead - behind

    def _adapt_gain(self, d: np.ndarray, dt: float) -> np.ndarray:
        """Per-tone smoothing gain, shortened where the innovations show lag.

        The innovations' short-term mean (time constant ``tau_min_s``) is pooled over
        ``2 * LAG_POOL_TONES + 1`` neighbouring tones and compared with its spread under noise
        alone: a fade moves neighbouring tones together frame after frame, estimation noise does
        not. Where the pooled mean stands ``z`` noise spreads off zero with ``z > lag_sigmas``,
        the time constant becomes ``tau_s * (lag_sigmas / z)**2`` (at least ``tau_min_s``).
        """
        self._lag_gain = a_u = -math.expm1(-dt / self.tau_min_s)
        lag = self._lag_db
        lag *= 1.0 - a_u
        lag += a_u * d
        _, tau = self._lag_z2()
        # tau_s * min(1, lag_sigmas**2 / z**2), floored at tau_min_s (no faster than that)
        np.maximum(tau, self.lag_sigmas ** 2, out=tau)
        np.divide(self.tau_s * self.lag_sigmas ** 2, tau, out=tau)
        np.maximum(tau, min(self.tau_min_s, self.tau_s), out=tau)
        np.divide(-dt, tau, out=tau)
        np.expm1(tau, out=tau)
        np.negative(tau, out=tau)
        return tau

    # ------------------------------------------------------------------ output

    def tracked(self, now_s: float) -> Tracked | None:
        """The current per-tone view, or None before the first accepted frame.

        Parameters
        ----------
        now_s : float
            The caller's clock, seconds (same clock as given to :meth:`update`).

        Returns
        -------
        Tracked or None
        """
        if self._plan_id is None:
            return None
        snr_db = self._mean_db
        if self.tone_window > 0 and snr_db.size > 1:
            snr_db = _agree_smooth(snr_db, self.tone_window, self.tone_agree_db)
            snr_db.setflags(write=False)
        std_db = np.sqrt(self._var_db2)
        mean_std_db = np.sqrt(self._p11)
        worst = (self._predictor.worst_snr_db() if self.predict_s > 0 and self._explained
                 else None)
        if self.predict_s > 0 and self._inert:
            fall = np.zeros(snr_db.size) if self._frames > 1 else None
        else:
            fall = (self._predictor.fall_db(self._noise_var)
                    if self.predict_s > 0 and worst is None else None)
        if fall is None:
            spread = self._var_db2 + self._p11
        else:
            # the channel prediction covers the motion it explains: back off for the rest
            spread = np.minimum(self._var_db2, self._var_moving_db2)
            spread += self._p11
        np.sqrt(spread, out=spread)
        spread *= self.backoff_sigmas
        effective = np.subtract(snr_db, spread, out=spread)
        if worst is not None:
            # the predicted worst SNR itself (channel and smoothed noise; the measured
            # prediction error is its back-off); tones holding back an outlier keep the plain
            # view (a prediction through one odd frame is no trend)
            np.copyto(worst, effective, where=self._pend_n > 0)
            effective = worst
        elif fall is not None:
            # Tones holding back an outlier (a jump not yet confirmed) keep the plain view: a
            # line through one odd frame is no trend.
            fall[self._pend_n > 0] = 0.0
            effective += fall
        # Fresh arrays, read-only before anyone sees them: the record keeps them uncopied.
        for arr in (std_db, mean_std_db, effective):
            arr.setflags(write=False)
        return Tracked(
            plan_id=self._plan_id, tone_index=self._tones, snr_db=snr_db, std_db=std_db,
            effective_snr_db=effective, mean_std_db=mean_std_db,
            age_s=max(0.0, float(now_s) - self._accepted_now_s), frames=self._frames,
            center_hz=self._center_hz, time_s=self._time_s,
            predicted_s=self.predict_s if worst is not None else 0.0)


def _explains(estimate: Estimate) -> bool:
    """Whether the estimate's channel and noise variance give its SNR (within 0.5 dB on every
    tone): then the predicted channel over the smoothed noise is the SNR to load on. Sources
    that send only an SNR (a channel of ones) use the predicted fall instead."""
    h = estimate.channel.astype(np.complex128)
    power = h.real * h.real + h.imag * h.imag
    with np.errstate(divide="ignore", invalid="ignore"):
        implied = 10.0 * np.log10(power / estimate.noise_var)
    return bool(np.all(np.abs(implied - estimate.snr_db) < 0.5))


def _same_tuning(a: float, b: float) -> bool:
    if math.isnan(a) or math.isnan(b):
        return math.isnan(a) and math.isnan(b)
    return abs(a - b) < 0.5


def _agree_smooth(values_db: np.ndarray, window: int, agree_db: float) -> np.ndarray:
    """Symmetric sigma filter across tones.

    Tone ``i`` is averaged with the pair ``i - s, i + s`` (``s = 1 .. window``) when both lie within
    ``agree_db`` of it and every closer pair was taken too; otherwise it keeps its value. Taking
    neighbours only in pairs leaves a linear slope unbiased (a one-sided neighbour on a slope
    would pull the tone towards it, and toggle as the values wander near the threshold).
    """
    v = values_db
    n = v.size
    acc = v.copy()
    pairs = np.zeros(n)   # pairs taken per tone
    step = np.empty(n - 1)
    ok = None
    for shift in range(1, min(window, (n - 1) // 2) + 1):
        step_s = step[:n - shift]
        np.subtract(v[shift:], v[:-shift], out=step_s)
        np.abs(step_s, out=step_s)                   # |v[i + shift] - v[i]|
        pair_ok = np.maximum(step_s[:n - 2 * shift], step_s[shift:]) <= agree_db
        ok = pair_ok if ok is None else ok[1:-1] & pair_ok
        pair = v[:n - 2 * shift] + v[2 * shift:]
        pair *= ok
        acc[shift:n - shift] += pair
        pairs[shift:n - shift] += ok
    # 1 + 2 * pairs values: small integers, exact in any order
    pairs *= 2.0
    pairs += 1.0
    return np.divide(acc, pairs, out=acc)
