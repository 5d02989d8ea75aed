"""Frame synchronisation of the link model: timing, frequency offset and phase tracking.

:class:`FrameSync` holds every table these steps reuse, built once per plan:

1. **Timing and fractional offset** (Schmidl and Cox, IEEE Trans. Commun. 45(12), 1997): the
   metric ``M(d) = |P(d)|^2 / R(d)^2`` of the two-halves sync symbol, with ``R`` the mean energy
   of both halves (so ``M <= 1`` also where a burst starts or ends), first on a grid of
   ``B``-sample blocks (block sums, then window sums by pairwise adds, so the search costs
   about two passes over the block), then exactly around the first coarse peak above
   ``sync_threshold`` (:meth:`FrameSync.find`). The frame start is the middle of the metric's
   90 % plateau, which lies inside the cyclic prefix; the fractional offset is ``angle(P) / pi``
   tone spacings (:attr:`SyncPoint.fraction_tones`).
2. **Integer offset**: the differential pattern between sync and first training symbol, searched
   over even bin shifts within ``cfo_range_tones`` (Schmidl and Cox, sec. III;
   :meth:`FrameSync.integer_shift`).
3. **Fine offset**: the phase advance between the identical training symbols (baseline of one
   symbol) fixes the per-symbol phase step (:meth:`FrameSync.fine_offset_tones`,
   :meth:`FrameSync.symbol_phase`); a straight line through the data symbols' pilot phases,
   extended over the training and header rows, removes what remains, including the error of the
   step itself, which a strong interferer can bias (:meth:`FrameSync.row_phase`).

The receiver (:mod:`brimline.drivers.link.receiver`) composes these steps with the channel fit
(:mod:`~brimline.drivers.link.fit`) and the decisions (:mod:`~brimline.drivers.link.demod`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from brimline.drivers.link.frame import FrameFormat

__all__ = ["FrameSync", "SyncPoint", "sliding_sums", "block_sums"]


@dataclass(frozen=True)
class SyncPoint:
    """Outcome of a frame search in one block.

    Attributes
    ----------
    start : int
        Sample index of the sync symbol's FFT window (-1: no frame above the threshold).
    metric : float
        Schmidl-Cox metric at ``start`` (without a frame: the best metric seen).
    correlation : complex
        Half-symbol correlation ``P`` at ``start`` (0 without a frame).
    """

    start: int
    metric: float
    correlation: complex = 0j

    @property
    def found(self) -> bool:
        """True when a frame start was found."""
        return self.start >= 0

    @property
    def fraction_tones(self) -> float:
        """Fractional frequency offset ``angle(P) / pi`` in tone spacings."""
        z = self.correlation
        return float(np.arctan2(z.imag, z.real)) / np.pi  # np.angle without its wrapper


class FrameSync:
    """Timing, frequency offset and phase tracking for one frame format; build once per plan.

    Parameters
    ----------
    fmt : FrameFormat
        The frame format of the plan.
    sync_threshold : float
        Schmidl-Cox metric (0..1) above which a frame is detected.

    Raises
    ------
    ValueError
        When ``sync_threshold`` is outside (0, 1).
    """

    def __init__(self, fmt: FrameFormat, sync_threshold: float) -> None:
        plan = fmt.plan
        n = plan.fft_size
        if not 0.0 < sync_threshold < 1.0:
            raise ValueError(f"sync_threshold={sync_threshold} must be in (0, 1)")
        self.threshold = float(sync_threshold)
        self.plan = plan
        self._half = n // 2
        self._block = max(8, min(32, self._half // 8))
        self._decimate = self._block // 4 if self._half >= 256 else self._block // 8
        # Samples the coarse search tries first (a multiple of the block and decimation).
        self._coarse_head = 8 * plan.symbol_len // self._block * self._block
        # Derotation ramp exp(-2 pi i eps k / n) as an outer product of two short ramps (k = p
        # n2 + q), so each frame evaluates sqrt(n)-ish exponentials rather than n.
        self._ramp_split = 1 << (int(math.log2(n)) // 2)
        # Stored as complex128: a complex scalar times them casts them so on every frame.
        self._ramp_coarse = (-2.0 * np.pi * np.arange(n // self._ramp_split) * self._ramp_split
                             / n).astype(np.complex128)
        self._ramp_fine = (-2.0 * np.pi * np.arange(self._ramp_split) / n).astype(np.complex128)
        g = math.ceil(plan.cfo_range_tones / 2)
        self._shifts = 2 * np.arange(-g, g + 1)
        used_even = fmt.used[fmt.even_pos]
        self._int_bins = (used_even[None, :] + self._shifts[:, None]) % n
        self._diff_conj = np.conj(fmt.differential).astype(np.complex64)
        # Per-frame operands in the type the arithmetic runs in (the same casts, made once).
        self._pilots = fmt.pilots.astype(np.float32).astype(np.complex64)
        # -i k per symbol k: a frame's phase ramp is one outer product with its step.
        self._minus_j_index = -1j * np.arange(plan.n_symbols).astype(np.complex128)
        self._sqrt_n = math.sqrt(n)
        self._turns = np.empty((1, plan.data_symbols), np.complex64)
        index = np.arange(plan.data_symbols, dtype=np.float64)
        self._data_offsets = index - index.mean()
        self._row_offsets = (np.arange(1 + plan.train_symbols + plan.data_symbols)
                             - (1 + plan.train_symbols) - index.mean())
        self._data_index_spread = max(float(np.sum(self._data_offsets ** 2)), 1.0)
        # The frames' derotated symbols and their spectra, reused by every call and grown to
        # the most frames asked for at once (a fresh 32 x 1024 complex64 array is above
        # glibc's first mmap threshold: page faults).
        self._windows = np.empty((1, plan.n_symbols, n), np.complex64)
        self._spectra = np.empty_like(self._windows)

    # ------------------------------------------------------------------ timing

    def find(self, r: np.ndarray) -> SyncPoint | None:
        """Search ``r`` for the first frame.

        Parameters
        ----------
        r : ndarray of complex64
            Contiguous baseband samples.

        Returns
        -------
        SyncPoint or None
            The frame start, or ``start=-1`` with the best metric seen when no frame passes the
            threshold; None when ``r`` is too short to search.
        """
        half, b = self._half, self._block
        cp = self.plan.cp_len
        # The coarse search looks at the block's head first (frames usually start there) and
        # at the whole block only when the head holds no crossing with its peak window.
        reach = (half + cp) // b + 2  # coarse points searched for the peak after a crossing
        head = self._coarse_head
        coarse = self.coarse_metric(r[:head]) if r.size > head + b else None
        if coarse is not None:
            mc, count = coarse
            above = (mc > self.threshold).nonzero()[0]
            if above.size == 0 or above[0] + reach > count:
                coarse = None
        if coarse is None:
            coarse = self.coarse_metric(r)
            if coarse is None:
                return None
            mc, count = coarse
            above = (mc > self.threshold).nonzero()[0]
        if above.size == 0:
            return SyncPoint(-1, float(mc.max(initial=0.0)))
        first = above[0]
        stop = min(first + reach, count)
        peak = first + int(mc[first:stop].argmax())
        # Exact metric at every sample around the coarse peak.
        lo = max(0, peak * b - cp - 2 * b)
        hi = min(peak * b + cp + 2 * b, r.size - 2 * half)
        if hi <= lo:
            return None
        # Window sums as the first window plus a running sum of what enters minus what
        # leaves, so the running sums span the search width rather than the whole segment.
        seg = r[lo:hi + 2 * half].astype(np.complex128)
        width = hi - lo + 1
        prod = np.conj(seg[:-half])
        prod *= seg[half:]
        energy = seg.real * seg.real
        energy += seg.imag * seg.imag
        pf = np.empty(width, np.complex128)
        pf[0] = prod[:half].sum()
        np.cumsum(prod[half:half + width - 1] - prod[:width - 1], out=pf[1:])
        pf[1:] += pf[0]
        rf = np.empty(width)
        rf[0] = energy[:2 * half].sum()
        np.cumsum(energy[2 * half:2 * half + width - 1] - energy[:width - 1], out=rf[1:])
        rf[1:] += rf[0]
        rf *= 0.5
        mf = (pf.real ** 2 + pf.imag ** 2) / np.maximum(rf * rf, 1e-30)
        top = int(mf.argmax())
        if not mf[top] > self.threshold:  # a coarse false alarm: not confirmed exactly
            return SyncPoint(-1, float(mf[top]))
        low = mf < 0.9 * mf[top]
        left_edges = low[:top].nonzero()[0]
        right_edges = low[top:].nonzero()[0]
        left = left_edges[-1] + 1 if left_edges.size else 0
        right = top + right_edges[0] - 1 if right_edges.size else width - 1
        d = (left + right) // 2
        return SyncPoint(lo + d, float(mf[d]), complex(pf[d]))

    def coarse_metric(self, r: np.ndarray) -> tuple[np.ndarray, int] | None:
        """Coarse Schmidl-Cox metric at every ``B``-th sample start of ``r``.

        Parameters
        ----------
        r : ndarray of complex64
            Baseband samples.

        Returns
        -------
        tuple of (ndarray, int) or None
            The metric per block start and the number of starts, from every ``dec``-th sample
            summed over blocks of ``B``; None when ``r`` is too short.
        """
        half, b, dec = self._half, self._block, self._decimate
        rd = r[::dec].copy() if dec > 1 else r
        hd = half // dec
        zd = np.conj(rd[:-hd]) * rd[hd:]
        ed = np.abs(rd)
        ed *= ed
        lb, bd = half // b, b // dec
        nz, ne = zd.size // bd, ed.size // bd
        count = min(nz - lb, ne - 2 * lb) + 1
        if count <= 0:
            return None
        pc = sliding_sums(block_sums(zd, bd, nz), lb)[:count]
        rc = sliding_sums(block_sums(ed, bd, ne), 2 * lb)[:count]
        rc *= 0.5
        return (pc.real ** 2 + pc.imag ** 2) / np.maximum(rc * rc, 1e-30), count

    # ------------------------------------------------------------------ frequency offset

    def spectra(self, r: np.ndarray, starts, eps_fracs,
                out: np.ndarray | None = None) -> np.ndarray:
        """Unnormalized spectra of every symbol of the frames starting at ``starts``.

        Parameters
        ----------
        r : ndarray of complex64
            Baseband samples.
        starts : sequence of int
            Start of each frame's sync symbol FFT window in ``r``.
        eps_fracs : sequence of float
            Each frame's frequency offset (tone spacings), removed in the time domain first.
        out : ndarray of complex64, optional
            Where to write the spectra (default: this object's work array, which the next
            call overwrites).

        Returns
        -------
        ndarray of complex64, shape (frames, symbols, fft_size)
            The spectra of every symbol of each frame (cyclic prefixes dropped): one batched
            FFT per frame.
        """
        plan = self.plan
        n, s = plan.fft_size, plan.symbol_len
        span = plan.n_symbols * s
        count = len(starts)
        if self._windows.shape[0] < count:
            self._windows = np.empty((count,) + self._windows.shape[1:], np.complex64)
            self._spectra = np.empty_like(self._windows)
        windows = self._windows[:count]
        if out is None:
            out = self._spectra[:count]
        for k, (d0, eps) in enumerate(zip(starts, eps_fracs)):
            if d0 + span <= r.size:  # a reshaped view costs less than as_strided
                frame = r[d0:d0 + span].reshape(plan.n_symbols, s)[:, :n]
            else:
                frame = np.lib.stride_tricks.as_strided(
                    r[d0:], shape=(plan.n_symbols, n), strides=(s * r.itemsize, r.itemsize),
                    writeable=False)
            # The ramp of this frame (a few short calls: cheaper per frame than the
            # bookkeeping of one batched ramp when a call holds one frame).
            coef = 1j * eps
            coarse = np.exp(coef * self._ramp_coarse).astype(np.complex64)
            derotate = coarse[:, None] * np.exp(coef * self._ramp_fine).astype(np.complex64)
            derotate = derotate.reshape(n)  # the outer product (ufunc.outer costs more)
            np.multiply(frame, derotate, out=windows[k])
            # Each frame's FFT right after its derotation, while its symbols are in the cache
            # (a frame's symbols fill about half of a core's L2 here; a batch, several).
            np.fft.fft(windows[k], axis=1, out=out[k])
        return out

    def integer_shift(self, spectra: np.ndarray) -> np.ndarray:
        """Integer offset per frame (an even number of tones) maximizing the correlation of the
        sync/training differential with its known pattern, from :meth:`spectra` (shape
        ([frames,] symbols, fft_size); without the frame axis, one offset as a 0-d value)."""
        cross = np.conj(spectra[..., 0, :]) * spectra[..., 1, :]
        score = np.abs(cross.take(self._int_bins, axis=-1, mode="clip") @ self._diff_conj)
        return self._shifts[score.argmax(axis=-1)]

    def fine_offset_tones(self, theta: float, eps_frac: float, shift: int) -> float:
        """Offset (tone spacings) left after ``eps_frac`` and ``shift``, from the measured
        per-symbol phase step ``theta`` (radians) between the identical training symbols."""
        plan = self.plan
        n, s = plan.fft_size, plan.symbol_len
        expected = 2 * np.pi * (eps_frac * s + shift * plan.cp_len) / n
        return math.remainder(theta - expected, 2 * np.pi) * n / (2 * np.pi * s)

    # ------------------------------------------------------------------ phase tracking

    def symbol_phase(self, thetas) -> np.ndarray:
        """Per-symbol correction ``exp(-i theta k) / sqrt(n)`` (complex64) for every symbol
        ``k`` of each frame (one ``theta`` per frame, a sequence or an array of float): removes
        the phase step and normalizes the FFT. Shape (frames, symbols)."""
        theta = np.asarray(thetas)
        # -i theta k by broadcasting (ufunc.outer costs more per call).
        coef = (theta[:, None] if theta.ndim else theta) * self._minus_j_index
        np.exp(coef, out=coef)
        coef /= self._sqrt_n
        return coef.astype(np.complex64)

    def row_phase(self, y_pilot: np.ndarray, h_pilot: np.ndarray,
                  phase: np.ndarray) -> np.ndarray:
        """Phase correction of the training, header and data rows from the data pilots.

        Parameters
        ----------
        y_pilot : ndarray of complex, shape ([frames,] data symbols, pilots)
            Received pilot tones of the data symbols (uncorrected spectra); the frame axis is
            left out for one frame, here and in the other arguments.
        h_pilot : ndarray of complex, shape ([frames,] pilots)
            Training-symbol channel at the pilot tones.
        phase : ndarray of complex64, shape ([frames,] symbols)
            :meth:`symbol_phase` of the frames.

        Returns
        -------
        ndarray of complex64, shape ([frames,] rows after the sync symbol)
            ``phase`` times a straight line through the data symbols' common phases: a line
            follows a residual offset with far less noise than each symbol's own phase, and,
            extended over the training and header rows, also removes an error of the training
            phase step (which shows up as a slope).
        """
        t = self.plan.train_symbols
        ref = np.conj(h_pilot[..., None, :]) * self._pilots
        np.multiply(y_pilot, ref, out=ref)
        common = np.add.reduce(ref, axis=-1)  # the sum without its Python wrapper
        common *= phase[..., t + 2:]
        # The first symbol's phase, then the phase differences of neighbours (unwrapped),
        # all in one arctan2 call; their running sum is the common phase per symbol.
        if common.ndim == 1:
            turns = self._turns[0]
        else:
            turns = self._turns[:common.shape[0]]
            if turns.shape[0] < common.shape[0]:
                turns = self._turns = np.empty_like(common)
        turns[..., 0] = common[..., 0]
        np.multiply(common[..., 1:], np.conj(common[..., :-1]), out=turns[..., 1:])
        cpe = np.arctan2(turns.imag, turns.real).cumsum(axis=-1)
        cpe_wide = cpe.astype(np.float64)
        # One dot product per frame (a matrix-vector product may sum in another order).
        mean = np.add.reduce(cpe, axis=-1) / cpe.shape[-1]  # float32, without the wrapper
        if cpe_wide.ndim == 1:
            line = self._row_offsets * (np.dot(self._data_offsets, cpe_wide)
                                        / self._data_index_spread)
            line += float(mean)
        else:
            slope = np.array([np.dot(self._data_offsets, row) for row in cpe_wide])
            slope /= self._data_index_spread
            line = self._row_offsets * slope[:, None]
            line += mean[:, None]
        return phase[..., 1:] * np.exp(-1j * line).astype(np.complex64)


def sliding_sums(a: np.ndarray, width: int) -> np.ndarray:
    """Sums of every ``width`` consecutive elements.

    Parameters
    ----------
    a : ndarray
        One-dimensional input.
    width : int
        Window length (at least 1).

    Returns
    -------
    ndarray
        ``a.size - width + 1`` sums; for a power-of-two width by log2(width) pairwise adds
        (vectorized, unlike a running sum), else by a cumulative sum.
    """
    if width & (width - 1):
        c = np.concatenate([np.zeros(1, a.dtype), np.cumsum(a)])
        return c[width:] - c[:-width]
    out, span = a, 1
    while span < width:
        out = out[:-span] + out[span:]
        span *= 2
    return out


def block_sums(a: np.ndarray, size: int, count: int) -> np.ndarray:
    """Sums of ``count`` consecutive blocks of ``size`` elements of ``a``.

    Parameters
    ----------
    a : ndarray
        One-dimensional input with at least ``count * size`` elements.
    size, count : int
        Block length and number of blocks.

    Returns
    -------
    ndarray
        ``count`` sums, by a few strided adds (a reduce over a short inner axis is several
        times slower).
    """
    out = a[0:count * size:size].copy()
    for k in range(1, size):
        out += a[k:count * size:size]
    return out
