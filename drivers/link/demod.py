"""Demodulation of the link model: QAM hard decisions, per-map tables and the header bits.

* :func:`decision_threshold_lin`: the channel SNR at which decisions become reliable enough to
  estimate with (``DECISION_SER``), from the shared QAM grid error rate
  (:func:`brimline.daemon.core.qam.grid_ser`).
* :class:`MapTables`: per-map tables (levels per axis, gain per tone, reliability threshold),
  built once per map and cached by :class:`MapTableCache`.
* :func:`decide`: minimum-distance decisions on every data tone at once.
* :class:`HeaderDemod`: the header's repeated BPSK bits, combined robustly to a narrowband
  interferer, and the header row's known values once its CRC passes.
"""

from __future__ import annotations

from typing import Callable

import numpy as np

from brimline.daemon.core.qam import grid_ser
from brimline.drivers.link.fit import as_pairs
from brimline.drivers.link.frame import HEADER_BITS, FrameFormat, grid_axes

__all__ = ["DECISION_SER", "decision_threshold_lin", "MapTables", "MapTableCache",
           "MapLookup", "decide", "HeaderDemod"]

#: Symbol error rate up to which a tone's hard decisions count as reliable for its estimate.
#: Measured on static EVA at 20 dB (QPSK): the decision-directed SNR bias is below 0.2 dB for
#: tones at 3-6 dB (SER about 1e-1) and +1.7 dB at 0-3 dB. A stricter 1e-2 sends tones the
#: noisier known-symbol estimate needlessly (that estimate spreads about 1.3 dB at 10 dB).
DECISION_SER = 1e-1

#: ``lookup(map_seq) -> (bits, power_lin)`` over the data tones, or None when unknown.
MapLookup = Callable[[int], "tuple[np.ndarray, np.ndarray] | None"]


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


class MapTables:
    """Demodulation tables of one map (levels per axis, amplitude per tone).

    Parameters
    ----------
    bits : ndarray of int
        Bits per data tone.
    power_lin : ndarray of float
        Linear power per data tone relative to nominal.

    Attributes
    ----------
    bits : ndarray of int64
        The map's bits per data tone.
    reliable_snr : ndarray
        Channel SNR ``|H|^2 / noise`` at nominal power above which a tone's decisions are
        reliable enough for the decision-directed estimate (0 for tones that are off).
    b_q : ndarray
        Bits on the Q axis per tone (for the symbol values of the decisions).
    """

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
        #: The same as complex64, the type a division by the channel casts it to.
        self.half_inv_gain_c64 = self.half_inv_gain_tone.astype(np.complex64)
        self.half_top = (0.5 * top).astype(np.float32)
        self.two_gain = np.repeat(2.0 * gain, 2).reshape(-1, 2).astype(np.float32)
        self.gain_top = (gain[:, None] * top).astype(np.float32)


class MapTableCache:
    """The default map's tables and those of recent maps, looked up by header sequence.

    Parameters
    ----------
    n_tones : int
        Data tones of the plan.
    default_bits : int
        Bits per data tone of the default map (header sequence -1), at nominal power.
    """

    def __init__(self, n_tones: int, default_bits: int) -> None:
        default = MapTables(np.full(n_tones, int(default_bits)), np.ones(n_tones))
        self._tables: dict[int, MapTables] = {-1: default}

    def tables_for(self, seq: int | None, lookup: MapLookup | None) -> MapTables | None:
        """Tables of map ``seq`` (-1: the default map), or None when it is unknown.

        Parameters
        ----------
        seq : int or None
            Map sequence number from the header (None: the header failed).
        lookup : MapLookup or None
            Asked once for a sequence number not seen yet.

        Returns
        -------
        MapTables or None
        """
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
        tables = MapTables(np.asarray(bits), np.asarray(power, dtype=np.float64))
        if len(self._tables) > 16:  # keep the default and the most recent maps
            for key in list(self._tables)[1:-8]:
                del self._tables[key]
        self._tables[seq] = tables
        return tables


def decide(y: np.ndarray, h: np.ndarray, tables: MapTables,
           points: np.ndarray | None = None) -> np.ndarray:
    """Hard decisions on every data tone at once.

    Parameters
    ----------
    y : ndarray of complex64, shape (..., symbols, tones)
        Phase-corrected received values (a leading axis for several frames).
    h : ndarray of complex64
        One channel per element of ``y`` (the same shape), or one per tone that broadcasts
        against it (shape (tones,), or (frames, 1, tones)).
    tables : MapTables
        The map the values were sent with.
    points : ndarray of complex64, optional
        Shaped like ``y``: the decided constellation points are written there.

    Returns
    -------
    ndarray of float32, shape (..., symbols, tones, 2)
        The decided I and Q level indices.

    Notes
    -----
    Works on the complex arrays viewed as interleaved float32 (I, Q) pairs, so each step is one
    pass for both axes; the scale ``1 / (2 gain h)`` is one complex factor (the gain is the same
    on both axes). ``fmax``/``fmin`` rather than ``clip`` so that a NaN sample decides to a
    valid index.
    """
    if h.shape != y.shape:  # one channel per tone
        z = y * (tables.half_inv_gain_c64 / h)
    else:  # y conj(h) / |h|^2: a complex division is several times slower
        z = np.conj(h)
        hp = as_pairs(h)
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


class HeaderDemod:
    """The header symbol's repeated, scrambled BPSK bits for one frame format.

    Parameters
    ----------
    fmt : FrameFormat
        The frame format of the plan.
    """

    def __init__(self, fmt: FrameFormat) -> None:
        self.train_symbols = fmt.plan.train_symbols
        self._scramble = fmt.scramble.astype(np.float32)
        self._reps = fmt.header_reps
        # Which header bit each data tone carries (index HEADER_BITS: a filler tone, sign +1).
        bit_of_tone = np.full(fmt.n_used, HEADER_BITS)
        n_rep = fmt.header_reps * HEADER_BITS
        bit_of_tone[:n_rep] = np.tile(np.arange(HEADER_BITS), fmt.header_reps)
        self._header_bit_data = bit_of_tone[fmt.data_pos]
        self._scramble_data = self._scramble[fmt.data_pos]

    def soft(self, head: np.ndarray, h_train: np.ndarray, hit: np.ndarray,
             level: np.ndarray) -> np.ndarray:
        """Combined soft values of the header bits (negative: bit 1), per frame.

        Parameters
        ----------
        head : ndarray of complex, shape ([frames,] train_symbols + 1, used tones)
            Phase-corrected training rows and the header row (the frame axis may be left out,
            here and in the other arguments).
        h_train : ndarray of complex, shape ([frames,] used tones)
            Channel per used tone from the training symbols.
        hit : ndarray of bool, shape ([frames,] used tones)
            Used tones a narrowband interferer hits (erased).
        level : ndarray of float, shape ([frames,] used tones)
            Local channel power per used tone (each vote is clipped to 1.5 times it).

        Returns
        -------
        ndarray of float, shape ([frames,] HEADER_BITS)

        Notes
        -----
        Maximal-ratio combining ``sum Re(y conj(h))`` over the copies, with guards against a
        narrowband interferer, which inflates a tone's apparent channel or its header value:
        ``hit`` tones are erased and every vote is clipped. (Erasing tones whose training
        symbols differ was tried and dropped: in deep fades it erased good copies.)
        """
        t = self.train_symbols
        soft = (head[..., t, :] * np.conj(h_train)).real * self._scramble  # contiguous now
        bound = 1.5 * level
        np.minimum(soft, bound, out=soft)  # a clip to [-bound, bound] without np.clip's checks
        np.negative(bound, out=bound)
        np.maximum(soft, bound, out=soft)
        soft[hit] = 0.0
        reps = self._reps * HEADER_BITS
        # The sum over the copies without its Python wrapper.
        return np.add.reduce(
            soft[..., :reps].reshape(soft.shape[:-1] + (self._reps, HEADER_BITS)), axis=-2)

    def known_row(self, soft_bits: np.ndarray) -> np.ndarray:
        """The header row's values on the data tones (float32), from decided ``soft_bits``
        (shape ([frames,] HEADER_BITS)) whose CRC passed: they join the known rows of the
        channel fit. Returns shape ([frames,] data tones)."""
        signs = np.ones(soft_bits.shape[:-1] + (HEADER_BITS + 1,), np.float32)  # last: fillers
        signs[..., :HEADER_BITS][soft_bits < 0] = -1.0
        # A gather along the tone axis (a fancy index with a leading slice costs more).
        signs = signs.take(self._header_bit_data, axis=-1, mode="clip")
        signs *= self._scramble_data
        return signs
