"""Receiver DSP of the link model: frame sync, frequency offset, FFT, estimates, demodulation.

One call of :meth:`Receiver.receive` turns a block of complex baseband samples into an
:class:`RxFrame`. Steps (all vectorized; one batched FFT per frame):

1. **Timing and fractional offset** (Schmidl and Cox, IEEE Trans. Commun. 45(12), 1997): the
   metric ``M(d) = |P(d)|^2 / R(d)^2`` of the two-halves sync symbol, with ``R`` the mean energy
   of both halves (so ``M <= 1`` also where a burst starts or ends), first on a grid of
   ``B``-sample blocks (block sums, then window sums by pairwise adds, so the search costs
   about two passes over the block), then exactly around the first coarse peak above ``sync_threshold``. The frame start is
   the middle of the metric's 90 % plateau, which lies inside the cyclic prefix; the fractional
   offset is ``angle(P) / pi`` tone spacings.
2. **Integer offset**: the differential pattern between sync and first training symbol, searched
   over even bin shifts within ``cfo_range_tones`` (Schmidl and Cox, sec. III).
3. **Fine offset**: the phase advance between the identical training symbols (baseline of one
   symbol) fixes the per-symbol phase step; a straight line through the data symbols' pilot
   phases, extended over the training and header rows, removes what remains (including the
   error of the step itself, which a strong interferer can bias).
4. **Channel and noise**: data-aided least squares per tone over every symbol whose tone values
   are known: the training symbols, the header (after its CRC passes) and the data symbols (hard
   decisions, two passes), ``H = sum(conj(X) Y) / sum(|X|^2)``; the residual ``S = sum|Y - H X|^2``
   over ``N`` symbols gives ``noise_var = S / (N - 2)``, so that ``|H|^2 / noise_var`` is unbiased
   for the linear SNR (``E[1/S] = 1 / ((N - 2) sigma^2)`` for ``S ~ sigma^2 Gamma(N - 1)``), up to
   the ``+1/N`` term of the estimate's own noise in ``|H|^2``. Wrong decisions make the
   residual small, so a tone whose known-symbol SNR (training and header, noise pooled over
   neighbouring tones) is below what its constellation needs for a symbol error rate of
   ``DECISION_SER`` keeps that known-symbol estimate instead (one per-tone mask). Off tones
   (0 bits) send known zeros, so their data rows always count; tones a narrowband
   interferer hits stay out of the other tones' noise pools.

Bad input never raises: a block without a frame, a truncated frame or a header failing its CRC
comes back as an RxFrame with ``reason`` set.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Callable

import numpy as np

from brimline.daemon.core.qam import grid_ser
from brimline.daemon.records import TonePlan
from brimline.drivers.link.frame import GRAY, HEADER_BITS, FrameFormat, decode_header, grid_axes

__all__ = ["Receiver", "RxFrame", "MapLookup", "FrameScanner"]

#: Fine offset (tone spacings) above which a frame is transformed again with it.
_REFINE_TONES = 0.01

#: Symbol error rate up to which a tone's hard decisions count as reliable for its estimate.
#: Measured on static EVA at 20 dB (QPSK): the decision-directed SNR bias is below 0.2 dB for
#: tones at 3-6 dB (SER about 1e-1) and +1.7 dB at 0-3 dB. A stricter 1e-2 sends tones the
#: noisier known-symbol estimate needlessly (that estimate spreads about 1.3 dB at 10 dB).
DECISION_SER = 1e-1

#: Tones on each side pooled into the known-symbol noise level (reliability test, fallback).
_NOISE_POOL_HALF = 8

#: ``lookup(map_seq) -> (bits, power_lin)`` over the data tones, or None when unknown.
MapLookup = Callable[[int], "tuple[np.ndarray, np.ndarray] | None"]


@dataclass(frozen=True)
class RxFrame:
    """What the receiver made of one block.

    Attributes
    ----------
    reason : str
        "" for a good frame, else why it is flagged: "no_sync", "truncated", "clipped",
        "crc_failed" (the last two still carry estimates).
    start : int
        Sample index of the sync symbol's FFT window in the block (-1 without sync).
    end : int
        Sample index just after the frame (where the next search may begin).
    sync_metric : float
        Schmidl-Cox metric at the chosen start (coarse maximum without sync).
    cfo_hz : float
        Total frequency offset estimate in hertz.
    header_ok : bool
        Whether the header passed its CRC.
    map_seq : int
        Map sequence number from the header (-1 for the default map or a failed header).
    counter : int
        Frame counter from the header (-1 when the header failed).
    map_known : bool
        Whether the data symbols were demodulated (the map was known).
    channel, noise_var, snr_db : ndarray or None
        Per data tone: channel at nominal power, noise variance and SNR in dB.
    decided : tuple or None
        Decided (I level, Q level, Q bits) indices when the map was known; see ``values``.
    symbols_used : int
        Symbols per tone in the least-squares estimate (decision-directed tones; tones with
        unreliable decisions use the known rows only, with noise pooled over neighbours).
    """

    reason: str
    start: int = -1
    end: int = 0
    sync_metric: float = 0.0
    cfo_hz: float = 0.0
    header_ok: bool = False
    map_seq: int = -1
    counter: int = -1
    map_known: bool = False
    channel: np.ndarray | None = None
    noise_var: np.ndarray | None = None
    snr_db: np.ndarray | None = None
    decided: tuple | None = None
    symbols_used: int = 0

    @property
    def values(self) -> np.ndarray | None:
        """Decided symbol values, shape (data symbols, data tones), when the map was known."""
        if self.decided is None:
            return None
        i_idx, q_idx, b_q = self.decided
        return (GRAY[i_idx] << b_q) | GRAY[q_idx]

    @property
    def has_estimate(self) -> bool:
        """True when the frame carries a channel estimate."""
        return self.channel is not None


def decision_threshold_lin(target_ser: float = DECISION_SER, max_bits: int = 12) -> np.ndarray:
    """Per bit count 0..max_bits, the linear SNR at which the symbol error rate of this link's
    QAM grid (:func:`brimline.daemon.core.qam.grid_ser`) equals ``target_ser`` (bisection in
    dB; 0 bits: 0)."""
    out = np.zeros(max_bits + 1)
    for b in range(1, max_bits + 1):
        lo, hi = -20.0, 80.0
        for _ in range(60):
            mid = 0.5 * (lo + hi)
            if grid_ser(b, 10 ** (mid / 10))[()] > target_ser:
                lo = mid
            else:
                hi = mid
        out[b] = 10 ** (0.5 * (lo + hi) / 10)
    return out


_THRESHOLD_LIN = decision_threshold_lin()


class _MapTables:
    """Per-map demodulation tables (levels per axis, amplitude per tone)."""

    def __init__(self, bits: np.ndarray, power_lin: np.ndarray) -> None:
        m_i, m_q, b_q, scale = grid_axes(bits)
        self.bits = np.asarray(bits, dtype=np.int64)
        # Channel SNR |H|^2 / noise at nominal power above which this tone's decisions are
        # reliable enough for the decision-directed estimate (the map's power scales Es).
        need = _THRESHOLD_LIN[np.minimum(self.bits, _THRESHOLD_LIN.size - 1)]
        # A tone that is off (0 bits or no power) sends known zeros in its data symbols: its
        # data rows are noise alone and always count (threshold 0).
        on = (self.bits > 0) & (power_lin > 0)
        self.reliable_snr = np.divide(need, power_lin, out=np.zeros(need.shape), where=on)
        self.m_i1 = (m_i - 1).astype(np.float32)
        self.m_q1 = (m_q - 1).astype(np.float32)
        self.b_q = b_q
        gain = scale * np.sqrt(np.where(on, power_lin, 0.0))
        self.gain = gain.astype(np.float32)
        inv_gain = np.divide(1.0, gain, out=np.zeros_like(gain), where=gain > 0)
        # Interleaved (I, Q) per tone, matching a complex64 array viewed as float32 pairs:
        # index = rint(z / (2 gain) + (M - 1) / 2), clipped to [0, M - 1]; point = 2 gain index
        # - gain (M - 1).
        top = np.stack([m_i - 1, m_q - 1], axis=-1).astype(np.float64)
        self.top = top.astype(np.float32)
        self.zero = np.zeros_like(self.top)
        self.half_inv_gain_tone = (0.5 * inv_gain).astype(np.float32)
        self.half_top = (0.5 * top).astype(np.float32)
        self.two_gain = np.repeat(2.0 * gain, 2).reshape(-1, 2).astype(np.float32)
        self.gain_top = (gain[:, None] * top).astype(np.float32)


class Receiver:
    """Receiver DSP for one plan; build once, call :meth:`receive` per block.

    Parameters
    ----------
    plan : TonePlan
        The link plan (a bare TonePlan gets the default frame layout).
    default_bits : int
        Bits per data tone of the default map (header sequence -1), at nominal power.
    sync_threshold : float
        Schmidl-Cox metric (0..1) above which a frame is detected.
    clip_level : float or None
        Flag the frame "clipped" when more than ``clip_fraction`` of its samples have ``|I|`` or
        ``|Q|`` at or above this level (None: no check).
    clip_fraction : float
        Fraction of samples at the clip level that flags a frame.
    """

    def __init__(self, plan: TonePlan, *, default_bits: int = 2, sync_threshold: float = 0.3,
                 clip_level: float | None = None, clip_fraction: float = 1e-4) -> None:
        fmt = FrameFormat(plan)
        self.format, self.plan = fmt, fmt.plan
        plan = self.plan
        n = plan.fft_size
        if not 0.0 < sync_threshold < 1.0:
            raise ValueError(f"sync_threshold={sync_threshold} must be in (0, 1)")
        self.sync_threshold = float(sync_threshold)
        self.clip_level = clip_level
        self.clip_fraction = float(clip_fraction)
        self._half = n // 2
        self._block = max(8, min(32, self._half // 8))
        self._decimate = self._block // 4 if self._half >= 256 else self._block // 8
        # Samples the coarse search tries first (a multiple of the block and decimation).
        self._coarse_head = 8 * plan.symbol_len // self._block * self._block
        # Derotation ramp exp(-2 pi i eps k / n) as an outer product of two short ramps (k = p
        # n2 + q), so each frame evaluates sqrt(n)-ish exponentials rather than n.
        self._ramp_split = 1 << (int(math.log2(n)) // 2)
        self._ramp_coarse = -2.0 * np.pi * np.arange(n // self._ramp_split) * self._ramp_split / n
        self._ramp_fine = -2.0 * np.pi * np.arange(self._ramp_split) / n
        g = math.ceil(plan.cfo_range_tones / 2)
        self._shifts = 2 * np.arange(-g, g + 1)
        used_even = fmt.used[fmt.even_pos]
        self._int_bins = (used_even[None, :] + self._shifts[:, None]) % n
        self._diff_conj = np.conj(fmt.differential).astype(np.complex64)
        self._train = fmt.train.astype(np.float32)
        self._train_mean = self._train / plan.train_symbols
        self._train_data = self._train[fmt.data_pos]
        self._pilots = fmt.pilots.astype(np.float32)
        self._scramble = fmt.scramble.astype(np.float32)
        self._reps = fmt.header_reps
        # Which header bit each data tone carries (index HEADER_BITS: a filler tone, sign +1).
        bit_of_tone = np.full(fmt.n_used, HEADER_BITS)
        n_rep = fmt.header_reps * HEADER_BITS
        bit_of_tone[:n_rep] = np.tile(np.arange(HEADER_BITS), fmt.header_reps)
        self._header_bit_data = bit_of_tone[fmt.data_pos]
        self._scramble_data = self._scramble[fmt.data_pos]
        self._sym_index = np.arange(plan.n_symbols)
        index = np.arange(plan.data_symbols, dtype=np.float64)
        self._data_offsets = index - index.mean()
        self._row_offsets = (np.arange(1 + plan.train_symbols + plan.data_symbols)
                             - (1 + plan.train_symbols) - index.mean())
        self._data_index_spread = max(float(np.sum(self._data_offsets ** 2)), 1.0)
        rows = np.arange(1 + plan.train_symbols + plan.data_symbols, dtype=np.float64)
        offsets = (rows - rows.mean()).astype(np.float32)  # row times about their mean
        self._design = np.stack([np.ones_like(offsets), offsets, offsets * offsets])
        default = _MapTables(np.full(plan.data_tones.size, int(default_bits)),
                             np.ones(plan.data_tones.size))
        self._tables: dict[int, _MapTables] = {-1: default}
        tone = np.arange(plan.data_tones.size)
        lo = np.maximum(tone - _NOISE_POOL_HALF, 0)
        hi = np.minimum(tone + _NOISE_POOL_HALF + 1, tone.size)
        self._pool = (lo, hi, hi - lo)  # noise pool per data tone: [lo, hi) and its size

    # ------------------------------------------------------------------ public

    def receive(self, block: np.ndarray, lookup: MapLookup | None = None, *,
                demodulate: bool = True) -> RxFrame:
        """Find the first frame in ``block`` and estimate the channel from it.

        Parameters
        ----------
        block : ndarray of complex
            Baseband samples; converted to complex64.
        lookup : callable, optional
            ``lookup(map_seq) -> (bits, power_lin)`` for maps other than the default; without
            it (or when it returns None) the estimate uses the training symbols and header only.
        demodulate : bool
            Also make the final data decisions (``RxFrame.decided``, a second decision pass with
            the leave-one-out channel). The estimate does not depend on it.

        Returns
        -------
        RxFrame
            Never raises for bad samples; see ``RxFrame.reason``.
        """
        r = np.ascontiguousarray(block, dtype=np.complex64).ravel()
        plan = self.plan
        n, s, half = plan.fft_size, plan.symbol_len, self._half
        if r.size < 2 * n + plan.cp_len:
            return RxFrame("truncated" if r.size else "no_sync", end=r.size)
        sync = self._sync(r)
        if sync is None or sync[0] < 0:
            metric = 0.0 if sync is None else sync[1]
            # Nothing here: the next search may begin where a frame could still start.
            return RxFrame("no_sync", end=max(r.size - plan.frame_len, 1), sync_metric=metric)
        d0, metric, p = sync
        end = d0 + (plan.n_symbols - 1) * s + n
        if end > r.size:
            return RxFrame("truncated", start=d0, end=max(d0 - plan.cp_len, 1),
                           sync_metric=metric)
        eps_frac = float(np.angle(p)) / np.pi
        return self._estimate(r, d0, end, metric, eps_frac, lookup, demodulate)

    def _spectra(self, r: np.ndarray, d0: int, eps_frac: float) -> np.ndarray:
        """Unnormalized spectra of every symbol of the frame starting at ``d0``, with the
        offset ``eps_frac`` (tone spacings) removed in the time domain: one batched FFT."""
        plan = self.plan
        n, s = plan.fft_size, plan.symbol_len
        span = plan.n_symbols * s
        if d0 + span <= r.size:  # a reshaped view costs less than as_strided
            windows = r[d0:d0 + span].reshape(plan.n_symbols, s)[:, :n]
        else:
            windows = np.lib.stride_tricks.as_strided(
                r[d0:], shape=(plan.n_symbols, n), strides=(s * r.itemsize, r.itemsize),
                writeable=False)
        derotate = np.multiply.outer(
            np.exp(1j * eps_frac * self._ramp_coarse).astype(np.complex64),
            np.exp(1j * eps_frac * self._ramp_fine).astype(np.complex64)).ravel()
        return np.fft.fft(windows * derotate, axis=1)

    # ------------------------------------------------------------------ steps

    def _sync(self, r: np.ndarray):
        """Return (start, metric, P) of the first frame, (-1, best metric, 0) or None."""
        half, b = self._half, self._block
        cp = self.plan.cp_len
        # The coarse search looks at the block's head first (frames usually start there) and
        # at the whole block only when the head holds no crossing with its peak window.
        reach = (half + cp) // b + 2  # coarse points searched for the peak after a crossing
        head = self._coarse_head
        coarse = self._coarse(r[:head]) if r.size > head + b else None
        if coarse is not None:
            mc, count = coarse
            above = np.flatnonzero(mc > self.sync_threshold)
            if above.size == 0 or above[0] + reach > count:
                coarse = None
        if coarse is None:
            coarse = self._coarse(r)
            if coarse is None:
                return None
            mc, count = coarse
            above = np.flatnonzero(mc > self.sync_threshold)
        if above.size == 0:
            return -1, float(mc.max(initial=0.0)), 0
        first = above[0]
        stop = min(first + reach, count)
        peak = first + int(np.argmax(mc[first:stop]))
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
        top = int(np.argmax(mf))
        if not mf[top] > self.sync_threshold:  # a coarse false alarm: not confirmed exactly
            return -1, float(mf[top]), 0
        low = mf < 0.9 * mf[top]
        left_edges = np.flatnonzero(low[:top])
        right_edges = np.flatnonzero(low[top:])
        left = left_edges[-1] + 1 if left_edges.size else 0
        right = top + right_edges[0] - 1 if right_edges.size else width - 1
        d = (left + right) // 2
        return lo + d, float(mf[d]), complex(pf[d])

    def _coarse(self, r: np.ndarray):
        """Coarse Schmidl-Cox metric ``(mc, count)`` at every ``B``-th sample start of ``r``
        (None when ``r`` is too short): every dec-th sample, summed over blocks of B."""
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
        pc = _sliding_sums(_block_sums(zd, bd, nz), lb)[:count]
        rc = _sliding_sums(_block_sums(ed, bd, ne), 2 * lb)[:count]
        rc *= 0.5
        return (pc.real ** 2 + pc.imag ** 2) / np.maximum(rc * rc, 1e-30), count

    def _estimate(self, r, d0, end, metric, eps_frac, lookup, demodulate,
                  refine=True) -> RxFrame:
        plan, fmt = self.plan, self.format
        n, s, t = plan.fft_size, plan.symbol_len, plan.train_symbols
        spectra = self._spectra(r, d0, eps_frac)
        # Integer offset: even shift maximizing the sync/training differential correlation.
        cross = np.conj(spectra[0]) * spectra[1]
        score = np.abs(cross[self._int_bins] @ self._diff_conj)
        shift = int(self._shifts[int(np.argmax(score))])
        bins = (fmt.used_bins + shift) % n
        # Per-symbol phase step from the identical training symbols (all offsets together).
        head = np.take(spectra[1:t + 2], bins, axis=1)  # training symbols and header
        steps = np.conj(head[:t - 1]) * head[1:t]
        step = steps[0] if t == 2 else steps.sum(axis=0)
        # Tones a narrowband interferer dominates take no part: its own phase step would bias
        # the offset (and, through the time-domain correction, cost every tone some ICI).
        mag = np.abs(step)  # |H|^2 n per tone
        level = _local_level(mag)
        hit = mag > 2.0 * level  # 3 dB above the local level
        step[hit] = 0.0
        theta = float(np.angle(np.sum(step)))
        expected = 2 * np.pi * (eps_frac * s + shift * plan.cp_len) / n
        eps_fine = math.remainder(theta - expected, 2 * np.pi) * n / (2 * np.pi * s)
        if refine and abs(eps_fine) > _REFINE_TONES:
            # The sync offset was off (an interferer's share of the sync correlation biases it):
            # transform again with the fine offset, or the residual leaks between tones.
            return self._estimate(r, d0, end, metric, eps_frac + eps_fine, lookup, demodulate,
                                  refine=False)
        cfo_tones = eps_frac + shift + eps_fine
        phase = (np.exp(-1j * theta * self._sym_index) / math.sqrt(n)).astype(np.complex64)
        head *= phase[1:t + 2, None]
        h_train = head[0] + head[1] if t == 2 else head[:t].sum(axis=0)
        h_train *= self._train_mean  # training sign / t
        # Header: maximal-ratio combining of the repeated BPSK bits, robust to a narrowband
        # interferer (which would otherwise outvote the good copies of its bit).
        soft_bits = self._header_soft(head, h_train, hit, level * (1.0 / n))
        header_ok, seq, counter = decode_header((soft_bits < 0).astype(np.uint8))
        # Data symbols: remove the residual phase drift measured on the pilots. A straight line
        # through the per-symbol common phases follows a residual offset with far less noise
        # than each symbol's own phase.
        y_pilot = np.take(spectra[t + 2:], bins[fmt.pilot_pos], axis=1)
        ref = np.conj(h_train[fmt.pilot_pos]) * self._pilots
        common = np.sum(y_pilot * ref, axis=1) * phase[t + 2:]
        steps = np.angle(common[1:] * np.conj(common[:-1]))  # unwrapped phase differences
        cpe = np.concatenate(([np.angle(common[0])], steps)).cumsum()
        k = self._data_offsets
        slope = np.dot(k, cpe) / self._data_index_spread
        # The line also holds for the training and header rows: an error in the training phase
        # step shows up as a slope here, and extending the line removes it from every row.
        row_phase = phase[1:] * np.exp(-1j * (cpe.mean() + slope * self._row_offsets)).astype(
            np.complex64)
        # Least squares over every symbol with known tone values: training, header, data.
        dp = fmt.data_pos
        rows = np.take(spectra[1:], bins[dp], axis=1)  # (training + header + data, data tones)
        rows *= row_phase[:, None]
        x = np.empty(rows.shape, np.complex64)  # data rows are filled by the decisions
        x[:t] = self._train_data
        if header_ok:  # the header row is known once its CRC passes
            signs = np.ones(HEADER_BITS + 1, np.float32)  # the last: filler tones
            signs[:HEADER_BITS][soft_bits < 0] = -1.0
            x[t] = signs[self._header_bit_data] * self._scramble_data
        else:
            x[t] = 0.0
            rows[t] = 0.0  # an unknown header row takes no part
        tables = self._tables_for(seq if header_ok else None, lookup)
        known = t + int(header_ok)
        values = None
        if tables is not None:
            # Decide with the training channel; fit level and slope with those decisions (the
            # estimate); decide again with the leave-one-out channel (the demodulated data).
            self._decide(rows[t + 1:], h_train[dp], tables, points=x[t + 1:])  # h: one per tone
            h, h_rows, residual = _fit(rows, x, self._design, linear=True,
                                       leave_one_out=t + 1 if demodulate else None)
            used, decided = known + plan.data_symbols, None
            # S ~ sigma^2 Gamma(N - params): E[1/S] = 1 / ((N - params - 1) sigma^2).
            noise_var = residual * (1.0 / max(used - 3, 1))
            # Where a tone's decisions are unreliable, wrong decisions make the residual look
            # small (the SNR reads high): such tones keep the known-symbol estimate instead.
            # A tone whose decision-directed SNR reads 3 dB above the need is reliable: the
            # upward bias of unreliable decisions stays below that (a cheap pre-test).
            if np.any(_power(h) < (2.0 * tables.reliable_snr) * noise_var):
                h_known, noise_known = self._known_fit(rows, x, known, hit[dp])
                weak = _power(h_known) < tables.reliable_snr * noise_known
                if weak.any():
                    h = np.where(weak, h_known, h)
                    noise_var = np.where(weak, noise_known, noise_var)
            if demodulate:
                idx = self._decide(rows[t + 1:], h_rows[t + 1:], tables).astype(np.uint8)
                decided = (idx[..., 0], idx[..., 1], tables.b_q)
        elif known < 3:
            # Training alone (the header failed): one degree of freedom per tone, S ~ sigma^2
            # Gamma(1), and 1/S has no finite mean (AWGN at 20 dB: +2.5 dB mean, tones up to
            # 46 dB high). The noise pooled over neighbouring tones has ~17 and is unbiased.
            h, noise_var = self._known_fit(rows, x, known, hit[dp])
            used, decided = known, None
        else:
            h, _, residual = _fit(rows[:t + 1], x[:t + 1], None, linear=False)
            used, decided = known, None
            noise_var = residual * (1.0 / max(used - 2, 1))
        noise_var = np.maximum(noise_var, 1e-30)
        snr_db = 10.0 * np.log10(np.maximum(_power(h) / noise_var, 1e-30))
        reason = "" if header_ok else "crc_failed"
        if self.clip_level is not None:
            frame = r[max(d0 - plan.cp_len, 0):end]
            hits = np.count_nonzero((np.abs(frame.real) >= self.clip_level)
                                    | (np.abs(frame.imag) >= self.clip_level))
            if hits > self.clip_fraction * frame.size:
                reason = "clipped"
        return RxFrame(
            reason=reason, start=d0, end=end, sync_metric=metric,
            cfo_hz=cfo_tones * plan.tone_spacing_hz, header_ok=header_ok,
            map_seq=seq if header_ok else -1, counter=counter if header_ok else -1,
            map_known=tables is not None, channel=h, noise_var=noise_var, snr_db=snr_db,
            decided=decided, symbols_used=used)

    # ------------------------------------------------------------------ helpers

    def _header_soft(self, head: np.ndarray, h_train: np.ndarray, hit: np.ndarray,
                     level: np.ndarray) -> np.ndarray:
        """Combined soft values of the header bits (negative: bit 1), from phase-corrected
        training rows and header row ``head``, the training channel ``h_train``, the tones
        ``hit`` by a narrowband interferer and the local channel power ``level`` per tone.

        Maximal-ratio combining ``sum Re(y conj(h))`` over the copies, with guards against a
        narrowband interferer, which inflates a tone's apparent channel or its header value:
        ``hit`` tones are erased and every vote is clipped to 1.5 times the local level.
        (Erasing tones whose training symbols differ was tried and dropped: in deep fades it
        erased good copies.)
        """
        t = self.plan.train_symbols
        soft = (head[t] * np.conj(h_train)).real
        soft *= self._scramble
        np.clip(soft, -1.5 * level, 1.5 * level, out=soft)
        soft[hit] = 0.0
        reps = self._reps * HEADER_BITS
        return soft[:reps].reshape(self._reps, HEADER_BITS).sum(axis=0)

    def _known_fit(self, rows: np.ndarray, x: np.ndarray, known: int,
                   hit: np.ndarray | None = None):
        """Channel and noise level per tone from the known rows alone (training, and the header
        when its CRC passed): the constant fit per tone, and its residuals pooled over the
        ``2 * _NOISE_POOL_HALF + 1`` nearest tones (fewer at the band edges). One tone's own
        ``known - 1`` degrees of freedom give a noise estimate whose reciprocal has no finite
        variance at ``known = 3``; the pool has about 17 times as many. Pooled ``S ~ sigma^2
        Gamma(D)`` is divided by ``D - 1``, so ``1 / noise`` stays unbiased.

        Tones ``hit`` by a narrowband interferer (mask over the data tones) stay out of the
        other tones' pools: their residual is the interferer's, tens of dB above the noise, and
        would make every tone within reach read that much low. A hit tone's own pool keeps
        every tone, itself included.
        """
        t = self.plan.train_symbols
        h, _, residual = _fit(rows[:t + 1], x[:t + 1], None, linear=False)
        dof = max(known - 1, 1)
        lo, hi, count = self._pool
        c = np.zeros(residual.size + 1, np.float64)
        np.cumsum(residual, out=c[1:])
        noise = c[hi] - c[lo]
        noise /= np.maximum(count * dof - 1, 1)
        if hit is not None and hit.any():
            clean = ~hit
            np.cumsum(np.where(clean, residual, 0.0), out=c[1:])
            n_clean = np.concatenate(([0], np.cumsum(clean)))
            n_clean = n_clean[hi] - n_clean[lo]
            pooled = (c[hi] - c[lo]) / np.maximum(n_clean * dof - 1, 1)
            noise = np.where(clean & (n_clean * dof > 1), pooled, noise)
        return h, noise

    def _tables_for(self, seq: int | None, lookup: MapLookup | None) -> _MapTables | None:
        if seq is None:
            return None
        if seq == -1:
            return self._tables[-1]
        if lookup is None:
            return None
        cached = self._tables.get(seq)  # sequence numbers are never reused
        if cached is not None:
            return cached
        found = lookup(seq)
        if found is None:
            return None
        bits, power = found
        tables = _MapTables(np.asarray(bits), np.asarray(power, dtype=np.float64))
        if len(self._tables) > 16:  # keep the default and the most recent maps
            for key in list(self._tables)[1:-8]:
                del self._tables[key]
        self._tables[seq] = tables
        return tables

    @staticmethod
    def _decide(y: np.ndarray, h: np.ndarray, tables: _MapTables,
                points: np.ndarray | None = None) -> np.ndarray:
        """Hard decisions on every data tone at once; returns the I and Q level indices.

        ``h`` is one channel per tone (shape (tones,)) or one per element. With ``points`` (a
        complex64 array shaped like ``y``) the decided constellation points are written there.
        Works on the complex arrays viewed as interleaved float32 (I, Q) pairs, so each step is
        one pass for both axes; the scale ``1 / (2 gain h)`` is one complex factor (the gain is
        the same on both axes). ``fmax``/``fmin`` rather than ``clip`` so that a NaN sample
        decides to a valid index.
        """
        if h.ndim == 1:
            z = y * (tables.half_inv_gain_tone / h)
        else:  # y conj(h) / |h|^2: a complex division is several times slower
            z = np.conj(h)
            hp = _as_pairs(h)
            mag = hp[..., 0::2] * hp[..., 0::2]
            mag += hp[..., 1::2] * hp[..., 1::2]
            np.divide(tables.half_inv_gain_tone, mag, out=mag)
            z *= y
            z *= mag.astype(np.complex64)
        idx = z.view(np.float32).reshape(*z.shape, 2)
        idx += tables.half_top
        np.rint(idx, out=idx)
        np.fmax(idx, tables.zero, out=idx)  # an array operand: a scalar is 3x slower here
        np.fmin(idx, tables.top, out=idx)
        if points is not None:
            out = points.view(np.float32).reshape(idx.shape)
            np.multiply(idx, tables.two_gain, out=out)
            out -= tables.gain_top
        return idx


def _fit(rows: np.ndarray, x: np.ndarray, design: np.ndarray | None, *, linear: bool,
         leave_one_out: int | None = None):
    """Per-tone least-squares channel ``h0 + slope * o[n]`` over symbol rows.

    Returns ``(h, h_rows, residual)``: the channel at each tone's energy centroid in time (what
    the estimate reports), the channel per row and the residual energy ``sum |y - h_n x|^2`` per
    tone. ``design`` holds the rows ``(1, o, o^2)`` (float32, shape (3, rows)) with ``o`` the row
    times about their mean (None with ``linear=False``, which fits a constant). With ``leave_one_out=k`` the channel of rows ``k:``
    is the fit *without* that row, exact from the leverage ``q_i = |x_i|^2 w_i``:
    ``H_-i = (H_i - w_i conj(x_i) y_i) / (1 - q_i)``, so a symbol's own, possibly wrong,
    decision cannot pull the channel it is decided with.
    """
    # Weighted sums over rows are small matrix products against the (rows x 1, o, o^2) design
    # on float32 views of the complex arrays (same-type BLAS loops, no casts); squared
    # magnitudes are I^2 + Q^2 on the interleaved pairs (one pass, no square root).
    nrow = rows.shape[0]
    corr = np.conj(x)
    corr *= rows
    xp = _as_pairs(x)
    sq = xp * xp
    if not linear:
        ones = np.ones(nrow, np.float32)
        a = np.maximum(_pair_sum(ones @ sq), 1e-30)
        h = _as_complex(ones @ _as_pairs(corr)) / a
        h_rows = np.broadcast_to(h, rows.shape)
        err = rows - h * x
    else:
        o = design[1]
        moments = _pair_sum(design @ sq)
        a, b, c = np.maximum(moments[0], 1e-30), moments[1], moments[2]
        uv = _as_complex(design[:2] @ _as_pairs(corr))  # (sum conj(x) y, sum o conj(x) y)
        u, v = uv[0], uv[1]
        det = np.maximum(a * c - b * b, 1e-30)
        inv_det = 1.0 / det
        coef = np.empty_like(uv)  # (h0, slope) per tone
        np.multiply(c * inv_det, u, out=coef[0])
        coef[0] -= (b * inv_det) * v
        np.multiply(a * inv_det, v, out=coef[1])
        coef[1] -= (b * inv_det) * u
        h0, slope = coef[0], coef[1]
        # Channel per row in one product: [1, o] (rows x 2) times [h0; slope] (2 x tones).
        h_rows = _as_complex(design[:2].T @ _as_pairs(coef))
        h = h0 + slope * (b / a)
        err = h_rows * x
        np.subtract(rows, err, out=err)
    ep = _as_pairs(err)
    ep *= ep
    residual = _pair_sum(np.ones(nrow, np.float32) @ ep)
    if linear and leave_one_out is not None:
        k = leave_one_out
        w = np.multiply.outer(o[k:] * o[k:], a * inv_det)
        w -= np.multiply.outer(o[k:], 2.0 * b * inv_det)
        w += c * inv_det
        part = h_rows[k:]
        part -= corr[k:] * w.astype(np.complex64)
        w *= _pair_sum(sq[k:])  # leverage |x|^2 w
        np.subtract(1.0, w, out=w)
        np.maximum(w, 1e-6, out=w)
        np.divide(1.0, w, out=w)
        part *= w.astype(np.complex64)
    return h, h_rows, residual


def _local_level(g: np.ndarray) -> np.ndarray:
    """Per-tone level of ``g`` that a one- or two-tone peak does not raise: the smaller of the
    larger of the tones two and three away on each side (edges repeat the end values)."""
    m = g.size
    pad = np.concatenate([g[:3], g, g[-3:]])
    left = np.maximum(pad[0:m], pad[1:m + 1])
    return np.minimum(left, np.maximum(pad[5:m + 5], pad[6:m + 6]))


def _sliding_sums(a: np.ndarray, width: int) -> np.ndarray:
    """Sums of every ``width`` consecutive elements (``a.size - width + 1`` of them): for a
    power-of-two width by log2(width) pairwise adds (vectorized, unlike a running sum)."""
    if width & (width - 1):
        c = np.concatenate([np.zeros(1, a.dtype), np.cumsum(a)])
        return c[width:] - c[:-width]
    out, span = a, 1
    while span < width:
        out = out[:-span] + out[span:]
        span *= 2
    return out


def _block_sums(a: np.ndarray, size: int, count: int) -> np.ndarray:
    """Sums of ``count`` consecutive blocks of ``size`` elements (a few strided adds: a reduce
    over a short inner axis is several times slower)."""
    out = a[0:count * size:size].copy()
    for k in range(1, size):
        out += a[k:count * size:size]
    return out


def _as_pairs(z: np.ndarray) -> np.ndarray:
    """A complex64 array's float32 view, (..., n) -> (..., 2n) interleaved I, Q."""
    return z.view(np.float32)


def _pair_sum(pairs: np.ndarray) -> np.ndarray:
    """Sum of each interleaved (I, Q) pair, (..., 2n) -> (..., n) (strided add, not a reduce)."""
    return pairs[..., 0::2] + pairs[..., 1::2]


def _as_complex(pairs: np.ndarray) -> np.ndarray:
    """Inverse of :func:`_as_pairs` (contiguous float32 (..., 2n) -> complex64 (..., n))."""
    return np.ascontiguousarray(pairs, dtype=np.float32).view(np.complex64)


def _power(x: np.ndarray) -> np.ndarray:
    p = np.abs(x)
    p *= p
    return p


class FrameScanner:
    """Finds successive frames in a stream of samples fed in pieces (recordings, radio buffers).

    Parameters
    ----------
    receiver : Receiver
        The receiver DSP.
    demodulate : bool
        Make the final data decisions too (not needed for estimates).

    Notes
    -----
    The search window is two frames long; without a frame it advances by one frame length, so
    every possible frame start is searched with the whole frame inside the window.
    """

    def __init__(self, receiver: Receiver, *, demodulate: bool = False) -> None:
        self.receiver = receiver
        self.demodulate = bool(demodulate)
        self._buffer = np.zeros(0, np.complex64)
        self._offset = 0  # absolute index of self._buffer[0]

    @property
    def offset(self) -> int:
        """Absolute sample index of the first sample not yet consumed."""
        return self._offset

    def feed(self, samples: np.ndarray, lookup: MapLookup | None = None, *,
             final: bool = False) -> list[tuple[int, RxFrame]]:
        """Add samples; return ``(absolute start, RxFrame)`` for every frame found or flagged.

        Flagged entries (``reason`` "no_sync" per search window, "truncated" only at the end of
        a ``final`` feed) have no estimate. Samples that may still hold a frame are kept.
        """
        buf = np.concatenate([self._buffer, np.asarray(samples, dtype=np.complex64).ravel()])
        window = 2 * self.receiver.plan.frame_len
        pos, out = 0, []
        while buf.size - pos >= (window if not final else 1):
            res = self.receiver.receive(buf[pos:pos + window], lookup, demodulate=self.demodulate)
            at_end = pos + window >= buf.size
            if res.reason == "truncated" and not (final and at_end):
                if res.start < 0 or res.end <= 0:
                    break
                pos += res.end  # the frame starts later in the window: search again from there
                continue
            if res.reason in ("no_sync", "truncated"):
                if res.start >= 0 or res.reason == "no_sync":  # a short noise tail is no loss
                    out.append((self._offset + pos + max(res.start, 0), res))
                if final and at_end:
                    pos = buf.size
                    break
                pos += max(res.end, 1)
                continue
            out.append((self._offset + pos + res.start, res))
            pos += res.end
        self._buffer = buf[pos:].copy()
        self._offset += pos
        return out
