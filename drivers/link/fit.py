"""Channel and noise fit of the link model: per-tone least squares over the known symbols.

Data-aided least squares per tone over every symbol whose tone values are known: the training
symbols, the header (after its CRC passes) and the data symbols (hard decisions made with the
training channel) (:func:`fit_rows`). With the map known the channel is fitted as linear in time
(``h0 + slope * n``, reported at the tone's energy centroid); the residual
``S = sum|Y - H X|^2`` over ``N`` symbols gives ``noise_var = S / (N - 3)`` (a constant fit over
training and header when the map is unknown: ``S / (N - 2)``), so that ``|H|^2 / noise_var`` is
unbiased for the linear SNR (``E[1/S] = 1 / ((N - p - 1) sigma^2)`` for
``S ~ sigma^2 Gamma(N - p)`` with ``p`` fitted parameters), up to the ``+1/N`` term of the
estimate's own noise in ``|H|^2``. Demodulated data are decided again with the leave-one-out
channel (the fit without that symbol), so a symbol's own decision cannot pull the channel it is
decided with.

Wrong decisions make the residual small, so a tone whose known-symbol SNR (training and header,
noise pooled over neighbouring tones, :meth:`ChannelFit.known_rows`) is below what its
constellation needs for a symbol error rate of ``demod.DECISION_SER`` keeps that known-symbol
estimate instead (one per-tone mask, :meth:`ChannelFit.data_aided`). Off tones (0 bits) send
known zeros, so their data rows always count; tones a narrowband interferer hits
(:func:`local_level`) stay out of the other tones' noise pools.

The sums run on float32 views of the complex64 arrays (:func:`as_pairs`, :func:`pair_sum`,
:func:`as_complex`): same-type BLAS loops, no casts, squared magnitudes in one pass.
"""

from __future__ import annotations

import numpy as np

from brimline.daemon.records import TonePlan

__all__ = ["ChannelFit", "fit_rows", "local_level", "NOISE_POOL_HALF",
           "as_pairs", "pair_sum", "as_complex", "squared_magnitude"]

#: Tones on each side pooled into the known-symbol noise level (reliability test, fallback).
NOISE_POOL_HALF = 8


class ChannelFit:
    """Channel and noise estimates per data tone for one plan; build once, call per frame.

    Parameters
    ----------
    plan : TonePlan
        A link plan (``train_symbols`` and ``data_symbols`` fix the rows).

    Notes
    -----
    Rows are the symbols after the sync symbol: ``train_symbols`` training rows, the header row,
    then the data rows; ``x`` holds the known (or decided) tone values of each row, zero where a
    row takes no part.
    """

    def __init__(self, plan: TonePlan) -> None:
        self.train_symbols = int(plan.train_symbols)
        self.data_symbols = int(plan.data_symbols)
        rows = np.arange(1 + plan.train_symbols + plan.data_symbols, dtype=np.float64)
        offsets = (rows - rows.mean()).astype(np.float32)  # row times about their mean
        #: Design rows ``(1, o, o^2)`` of the linear fit (float32, shape (3, rows)).
        self.design = np.stack([np.ones_like(offsets), offsets, offsets * offsets])
        tone = np.arange(plan.data_tones.size)
        lo = np.maximum(tone - NOISE_POOL_HALF, 0)
        hi = np.minimum(tone + NOISE_POOL_HALF + 1, tone.size)
        self._pool = (lo, hi, hi - lo)  # noise pool per data tone: [lo, hi) and its size
        # Built once rather than per frame: the ones row of the constant fit over the known
        # rows, and the pooled noise divisor per degrees of freedom (filled as they occur).
        self._known_ones = np.ones(1 + plan.train_symbols, np.float32)
        self._pool_divisor: dict[int, np.ndarray] = {}

    def data_aided(self, rows: np.ndarray, x: np.ndarray, known: int,
                   reliable_snr: np.ndarray, hit: np.ndarray, *,
                   leave_one_out: bool) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """Channel (level and slope in time) and noise over every row, data decisions included.

        Parameters
        ----------
        rows, x : ndarray of complex64, shape ([frames,] rows, data tones)
            Phase-corrected received rows and their known or decided values, per frame (the
            frame axis may be left out, here, in ``hit`` and in what is returned).
        known : int
            Rows known without decisions (training, plus the header when its CRC passed).
        reliable_snr : ndarray
            Per tone, the channel SNR ``|H|^2 / noise`` above which its decisions count
            (``demod.MapTables.reliable_snr``).
        hit : ndarray of bool, shape ([frames,] data tones)
            Tones a narrowband interferer hits (kept out of the other tones' noise pools).
        leave_one_out : bool
            Make the data rows' channel the fit without that row (for the final decisions).

        Returns
        -------
        tuple of ndarray
            ``(channel, channel_rows, noise_var, pooled)``: the channel at each tone's energy
            centroid in time, the channel per row, the noise variance per tone and, per frame,
            whether some of its tones took the known-symbol estimate. ``noise_var`` is float32
            unless some frame's tones did, then float64 (a frame whose ``pooled`` is false holds
            float32 values there, exactly).

        Notes
        -----
        Each frame's result is the same as its fit on its own: frames only share the calls.
        """
        t = self.train_symbols
        h, h_rows, residual = fit_rows(rows, x, self.design, linear=True,
                                       leave_one_out=t + 1 if leave_one_out else None)
        used = known + self.data_symbols
        # S ~ sigma^2 Gamma(N - params): E[1/S] = 1 / ((N - params - 1) sigma^2).
        noise_var = residual * (1.0 / max(used - 3, 1))
        # Where a tone's decisions are unreliable, wrong decisions make the residual look
        # small (the SNR reads high): such tones keep the known-symbol estimate instead.
        # A tone whose decision-directed SNR reads 3 dB above the need is reliable: the
        # upward bias of unreliable decisions stays below that (a cheap pre-test, per frame).
        need = (2.0 * reliable_snr) * noise_var
        below = squared_magnitude(h) < need
        pooled = np.zeros(h.shape[:-1], bool)
        if below.any():
            doubtful = below.any(axis=-1)
            h_known, noise_known = self.known_rows(rows, x, known, hit)
            weak = squared_magnitude(h_known) < reliable_snr * noise_known
            weak &= doubtful[..., None]
            pooled = weak.any(axis=-1)
            if pooled.any():
                h = np.where(weak, h_known, h)
                noise_var = np.where(weak, noise_known, noise_var)
        return h, h_rows, noise_var, pooled

    def known_constant(self, rows: np.ndarray, x: np.ndarray,
                       known: int) -> tuple[np.ndarray, np.ndarray]:
        """Constant channel per tone over the known rows, each tone's noise from its own
        residual (``known - 2`` in the divisor, see the module notes); ``rows`` and ``x`` as for
        :meth:`data_aided`; returns ``(channel, noise_var)`` per frame and tone."""
        t = self.train_symbols
        h, _, residual = fit_rows(rows[..., :t + 1, :], x[..., :t + 1, :], None, linear=False,
                                  ones=self._known_ones)
        return h, residual * (1.0 / max(known - 2, 1))

    def known_rows(self, rows: np.ndarray, x: np.ndarray, known: int,
                   hit: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
        """Channel and noise level per tone from the known rows alone, noise pooled.

        Parameters
        ----------
        rows, x : ndarray of complex64, shape ([frames,] rows, data tones)
            As for :meth:`data_aided`; only the training and header rows are used.
        known : int
            Rows known without decisions (training, plus the header when its CRC passed).
        hit : ndarray of bool, shape ([frames,] data tones), optional
            Tones a narrowband interferer hits.

        Returns
        -------
        tuple of ndarray
            ``(channel, noise_var)`` per frame and data tone (noise float64).

        Notes
        -----
        The constant fit per tone, and its residuals pooled over the ``2 * NOISE_POOL_HALF + 1``
        nearest tones (fewer at the band edges). One tone's own ``known - 1`` degrees of freedom
        give a noise estimate whose reciprocal has no finite variance at ``known = 3``; the pool
        has about 17 times as many. Pooled ``S ~ sigma^2 Gamma(D)`` is divided by ``D - 1``, so
        ``1 / noise`` stays unbiased.

        Tones ``hit`` by a narrowband interferer stay out of the other tones' pools: their
        residual is the interferer's, tens of dB above the noise, and would make every tone
        within reach read that much low. A hit tone's own pool keeps every tone, itself
        included.
        """
        t = self.train_symbols
        h, _, residual = fit_rows(rows[..., :t + 1, :], x[..., :t + 1, :], None, linear=False,
                                  ones=self._known_ones)
        dof = max(known - 1, 1)
        lo, hi, count = self._pool
        divisor = self._pool_divisor.get(dof)
        if divisor is None:
            divisor = self._pool_divisor[dof] = np.maximum(count * dof - 1, 1)
        lead = residual.shape[:-1]  # (frames,), or () without the frame axis
        # Gathers along the tone axis with take (a 2-D fancy index costs more per call).
        c = np.zeros(lead + (residual.shape[-1] + 1,), np.float64)
        residual.cumsum(axis=-1, out=c[..., 1:])
        noise = c.take(hi, axis=-1)
        noise -= c.take(lo, axis=-1)
        noise /= divisor
        if hit is not None and hit.any():
            struck = hit.any(axis=-1)
            clean = ~hit
            np.where(clean, residual, 0.0).cumsum(axis=-1, out=c[..., 1:])
            n_clean = np.zeros(lead + (residual.shape[-1] + 1,), np.int64)
            clean.cumsum(axis=-1, out=n_clean[..., 1:])
            n_clean = n_clean.take(hi, axis=-1) - n_clean.take(lo, axis=-1)
            pooled = ((c.take(hi, axis=-1) - c.take(lo, axis=-1))
                      / np.maximum(n_clean * dof - 1, 1))
            take = clean & (n_clean * dof > 1)
            take &= struck[..., None]  # a frame with no hit tone keeps the first pool
            noise = np.where(take, pooled, noise)
        return h, noise


def fit_rows(rows: np.ndarray, x: np.ndarray, design: np.ndarray | None, *, linear: bool,
             leave_one_out: int | None = None,
             ones: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per-tone least-squares channel ``h0 + slope * o[n]`` over symbol rows, per frame.

    Parameters
    ----------
    rows, x : ndarray of complex64, shape ([frames,] rows, tones)
        Received values and the known (or decided) values sent, for one or more frames (the
        frame axis may be left out, and then is in what is returned).
    design : ndarray of float32, shape (3, rows), or None
        The rows ``(1, o, o^2)`` with ``o`` the row times about their mean (None with
        ``linear=False``, which fits a constant).
    linear : bool
        Fit level and slope in time rather than a constant.
    leave_one_out : int, optional
        With ``k``, the channel of rows ``k:`` is the fit *without* that row.
    ones : ndarray of float32, shape (rows,), optional
        For the constant fit: a ones vector the caller keeps (default: made on each call).

    Returns
    -------
    tuple of ndarray
        ``(h, h_rows, residual)``: the channel at each tone's energy centroid in time (what the
        estimate reports), shape (frames, tones), the channel per row, shaped like ``rows``
        (for the constant fit, shape (frames, 1, tones), which broadcasts against ``rows``),
        and the residual energy ``sum |y - h_n x|^2`` per frame and tone.

    Notes
    -----
    The leave-one-out channel is exact from the leverage ``q_i = |x_i|^2 w_i``:
    ``H_-i = (H_i - w_i conj(x_i) y_i) / (1 - q_i)``, so a symbol's own, possibly wrong,
    decision cannot pull the channel it is decided with.

    Frames share the calls, not the arithmetic: the sums over rows are one small matrix product
    per frame (a stacked ``matmul``), every other step is elementwise, so a frame's outputs are
    the same alone or among others.
    """
    # Weighted sums over rows are small matrix products against the (rows x 1, o, o^2) design
    # on float32 views of the complex arrays (same-type BLAS loops, no casts); squared
    # magnitudes are I^2 + Q^2 on the interleaved pairs (one pass, no square root).
    nrow = rows.shape[-2]
    corr = np.conj(x)
    corr *= rows
    xp = as_pairs(x)
    sq = xp * xp
    if not linear:
        if ones is None:
            ones = np.ones(nrow, np.float32)
        a = np.maximum(pair_sum(ones @ sq), 1e-30)
        h = as_complex(ones @ as_pairs(corr)) / a
        h_rows = h[..., None, :]  # the same channel in every row
        err = rows - h_rows * x
    else:
        o = design[1]
        moments = pair_sum(design @ sq)  # (frames, 3, tones)
        a, b, c = (np.maximum(moments[..., 0, :], 1e-30), moments[..., 1, :],
                   moments[..., 2, :])
        uv = as_complex(design[:2] @ as_pairs(corr))  # (sum conj(x) y, sum o conj(x) y)
        u, v = uv[..., 0, :], uv[..., 1, :]
        det = np.maximum(a * c - b * b, 1e-30)
        inv_det = 1.0 / det
        # The real factors c/det, b/det, a/det and b/a, cast once to the complex type that
        # multiplying them with complex values casts them to (a mixed-type multiply buffers).
        factors = np.empty((4,) + a.shape, np.float32)
        np.multiply(c, inv_det, out=factors[0])
        np.multiply(b, inv_det, out=factors[1])
        np.multiply(a, inv_det, out=factors[2])
        np.divide(b, a, out=factors[3])
        factors = factors.astype(np.complex64)
        coef = np.empty_like(uv)  # (h0, slope) per frame and tone
        np.multiply(factors[0], u, out=coef[..., 0, :])
        coef[..., 0, :] -= factors[1] * v
        np.multiply(factors[2], v, out=coef[..., 1, :])
        coef[..., 1, :] -= factors[1] * u
        h0, slope = coef[..., 0, :], coef[..., 1, :]
        # Channel per row in one product: [1, o] (rows x 2) times [h0; slope] (2 x tones).
        h_rows = as_complex(design[:2].T @ as_pairs(coef))
        h = slope * factors[3]
        h += h0
        err = h_rows * x
        np.subtract(rows, err, out=err)
    ep = as_pairs(err)
    ep *= ep
    # The design's first row is the ones (same values, same BLAS call, no new array).
    residual = pair_sum((design[0] if linear else ones) @ ep)
    if linear and leave_one_out is not None:
        k = leave_one_out
        scale = (a * inv_det)[..., None, :]
        w = (o[k:] * o[k:])[:, None] * scale  # (frames, rows - k, tones)
        w -= o[k:, None] * (2.0 * b * inv_det)[..., None, :]
        w += (c * inv_det)[..., None, :]
        part = h_rows[..., k:, :]
        part -= corr[..., k:, :] * w.astype(np.complex64)
        w *= pair_sum(sq[..., k:, :])  # leverage |x|^2 w
        np.subtract(1.0, w, out=w)
        np.maximum(w, 1e-6, out=w)
        np.divide(1.0, w, out=w)
        part *= w.astype(np.complex64)
    return h, h_rows, residual


def local_level(g: np.ndarray) -> np.ndarray:
    """Per-tone level of ``g`` that a one- or two-tone peak does not raise.

    Parameters
    ----------
    g : ndarray of float, shape (..., tones)
        A non-negative value per tone (at least one tone), for one or more frames.

    Returns
    -------
    ndarray
        The smaller of the larger of the tones two and three away on each side (edges repeat
        the end values); a tone above twice this level is taken as hit by a narrowband
        interferer.
    """
    m = g.shape[-1]
    pad = np.concatenate([g[..., :3], g, g[..., -3:]], axis=-1)
    left = np.maximum(pad[..., 0:m], pad[..., 1:m + 1])
    return np.minimum(left, np.maximum(pad[..., 5:m + 5], pad[..., 6:m + 6]))


def as_pairs(z: np.ndarray) -> np.ndarray:
    """A complex64 array's float32 view, (..., n) -> (..., 2n) interleaved I, Q."""
    return z.view(np.float32)


def pair_sum(pairs: np.ndarray) -> np.ndarray:
    """Sum of each interleaved (I, Q) pair, (..., 2n) -> (..., n) (strided add, not a reduce)."""
    return pairs[..., 0::2] + pairs[..., 1::2]


def as_complex(pairs: np.ndarray) -> np.ndarray:
    """Inverse of :func:`as_pairs` (contiguous float32 (..., 2n) -> complex64 (..., n))."""
    return np.ascontiguousarray(pairs, dtype=np.float32).view(np.complex64)


def squared_magnitude(x: np.ndarray) -> np.ndarray:
    """``|x|^2`` elementwise (float)."""
    p = np.abs(x)
    p *= p
    return p
