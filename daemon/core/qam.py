"""QAM theory: the SNR gap, and exact symbol and bit error rates of QAM on AWGN.

Shared by the loader (the gap that turns a target error rate into the power per bit,
:mod:`brimline.daemon.core.loading`) and the link's receiver (the SNR at which its hard
decisions become reliable, :mod:`brimline.drivers.link.receiver`), so both use one formula.

Conventions: ``es_n0`` is the average symbol energy over N0, linear. An odd bit count without
``cross`` is the rectangular grid of ``2**ceil(b/2) x 2**floor(b/2)`` points (BPSK for one bit),
the layout of the link's own constellations (``brimline.drivers.link.frame.grid_axes``). Cross
constellations (32-, 128-QAM, ...) are integrated cell by cell in
:mod:`brimline.daemon.core._lattice_cells`.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import special

from brimline.daemon.core._lattice_cells import constellation_ser, cross_points
from brimline.daemon.errors import InputError
from brimline.daemon.limits import between, check_db

__all__ = [
    "qam_gap_db",
    "qam_ser",
    "qam_ber",
    "grid_ser",
    "MAX_BITS",
    "GAP_NEIGHBOURS",
    "TARGET_SER",
]

#: Largest bits per QAM symbol handled here and by the loaders (65536-QAM).
MAX_BITS = 16

#: Nearest-neighbour count used by the gap formula: a large square QAM is two PAM dimensions and
#: an inner PAM point has two neighbours (the per-dimension count of the gap approximation,
#: Cioffi's DMT notes ch. 1; from memory for the form). With it a symbol error rate of 1e-7 gives
#: 9.76 dB, the common-practice "9.8 dB" gap of uncoded QAM.
GAP_NEIGHBOURS = 2.0

#: A target symbol error rate the gap formula accepts (``loading.target_ser`` too).
TARGET_SER = between(0.0, 0.5, low_open=True, high_open=True)


# --------------------------------------------------------------------------- gap


def qam_gap_db(target_ser: float, *, coding_gain_db: float = 0.0, margin_db: float = 0.0,
               neighbours: float = GAP_NEIGHBOURS) -> float:
    """SNR gap of uncoded QAM for a target symbol error rate, with coding gain and margin.

    Parameters
    ----------
    target_ser : float
        Target symbol error probability, in (0, 0.5).
    coding_gain_db : float
        Coding gain in dB, subtracted from the gap.
    margin_db : float
        Target noise margin in dB, added to the gap.
    neighbours : float
        Nearest-neighbour count ``Ne`` (default 2, see :data:`GAP_NEIGHBOURS`).

    Returns
    -------
    float
        ``10*log10(Q^-1(Pe/Ne)**2 / 3) - coding_gain_db + margin_db`` in dB.

    Raises
    ------
    InputError
        ``target_ser`` outside (0, 0.5) or a non-finite dB value.

    Notes
    -----
    The gap approximation ``b = log2(1 + SNR / Gamma)`` with ``Gamma = [Q^-1(Pe/Ne)]^2 / 3`` for
    uncoded QAM (Cioffi's DMT notes, ch. 1; the usual reading of the SNR gap). ``Q^-1`` is
    computed as ``sqrt(2) * erfcinv(2 x)``.

    Examples
    --------
    >>> round(qam_gap_db(1e-7), 2)
    9.76
    """
    pe = float(TARGET_SER.check("target_ser", target_ser, InputError))
    cg = check_db("coding_gain_db", coding_gain_db, error=InputError)
    mg = check_db("margin_db", margin_db, error=InputError)
    if not (math.isfinite(neighbours) and neighbours >= 1.0):
        raise InputError(f"neighbours={neighbours!r} must be >= 1")
    q_inv = math.sqrt(2.0) * float(special.erfcinv(2.0 * pe / neighbours))
    return 10.0 * math.log10(q_inv * q_inv / 3.0) - cg + mg


# --------------------------------------------------------------------------- error rates


def _qfunc(x):
    """Gaussian tail probability Q(x) = P(N(0,1) > x)."""
    return 0.5 * special.erfc(np.asarray(x, dtype=np.float64) / math.sqrt(2.0))


def _grid_shape(bits_per_symbol: int) -> tuple[int, int]:
    """Levels per dimension (in-phase, quadrature) of the rectangular QAM with that many bits."""
    if not isinstance(bits_per_symbol, (int, np.integer)) or not 1 <= bits_per_symbol <= MAX_BITS:
        raise InputError(f"bits_per_symbol={bits_per_symbol!r} must be an integer in 1..{MAX_BITS}")
    k_i = (int(bits_per_symbol) + 1) // 2
    return 2 ** k_i, 2 ** (int(bits_per_symbol) - k_i)


def _half_distance(es_n0, m_i: int, m_q: int) -> np.ndarray:
    """d/2 over the noise standard deviation per dimension, ``d / sqrt(2 N0)``.

    A rectangular grid of ``m_i x m_q`` points spaced ``d`` has average energy
    ``d**2 * (m_i**2 + m_q**2 - 2) / 12``.
    """
    es_n0 = np.asarray(es_n0, dtype=np.float64)
    return np.sqrt(6.0 * es_n0 / (m_i * m_i + m_q * m_q - 2))


def qam_ser(bits_per_symbol: int, es_n0, *, cross: bool = False) -> np.ndarray:
    """Exact symbol error probability of square, rectangular or cross QAM on AWGN.

    Parameters
    ----------
    bits_per_symbol : int
        1 (BPSK), 2 (4-QAM), 3 (4x2 rectangular), 4 (16-QAM), ... Without ``cross`` an odd
        count uses the rectangular grid of ``2**ceil(b/2) x 2**floor(b/2)`` points.
    es_n0 : float or array_like
        Average symbol energy over N0, linear.
    cross : bool
        Use the cross constellation (odd ``bits_per_symbol`` >= 5: 32-, 128-, 512-QAM ...).

    Returns
    -------
    ndarray
        Symbol error probability, same shape as ``es_n0``.

    Notes
    -----
    Minimum-distance detection on a rectangular grid decides each dimension separately, so
    ``P_c = (1 - P_I)(1 - P_Q)`` with the M-PAM error ``P = 2 (1 - 1/M) Q(d / sqrt(2 N0))``
    (Proakis, Digital Communications, 5th ed., sec. 4.3: for square M this is
    ``1 - (1 - P_sqrtM)**2`` with ``P_sqrtM = 2 (1 - 1/sqrt(M)) Q(sqrt(3 Es / ((M - 1) N0)))``).
    A cross constellation's cells next to the missing corners are not rectangles; its error
    rate is integrated cell by cell (``brimline.daemon.core._lattice_cells``), to about 1e-10
    relative, one SNR value at a time (milliseconds each: for tables and tests, not per frame).
    """
    if cross:
        if not isinstance(bits_per_symbol, (int, np.integer)) or bits_per_symbol < 5 \
                or bits_per_symbol % 2 == 0 or bits_per_symbol > 13:
            raise InputError(f"bits_per_symbol={bits_per_symbol!r} must be odd, 5..13 for a "
                             "cross constellation")
        pts = cross_points(int(bits_per_symbol))
        values = np.asarray(es_n0, dtype=np.float64)
        out = np.array([constellation_ser(pts, float(v)) for v in values.ravel()])
        return out.reshape(values.shape)
    _grid_shape(bits_per_symbol)  # validates the bit count
    return grid_ser(int(bits_per_symbol), es_n0)


def _gray_pam_bit_errors(m: int, x: np.ndarray) -> np.ndarray:
    """Average bit errors per symbol of Gray-coded M-PAM, exact, for half-distance ratios ``x``.

    Sums, over every transmitted level and every decision interval, the Hamming distance of the
    two Gray labels times the probability that the noise lands in that interval.
    """
    if m == 1:
        return np.zeros_like(x)
    levels = np.arange(m)
    gray = levels ^ (levels >> 1)
    ham = np.array([[bin(int(a ^ b)).count("1") for b in gray] for a in gray], dtype=np.float64)
    # Decision boundaries are half-way between levels: in units of d/2 from level i's centre,
    # interval j spans (2(j - i) - 1, 2(j - i) + 1), the outer ones open to infinity.
    offs = 2.0 * (levels[None, :] - levels[:, None])  # (tx, rx)
    lo = np.where(levels[None, :] == 0, -np.inf, offs - 1.0)
    hi = np.where(levels[None, :] == m - 1, np.inf, offs + 1.0)
    xx = x.reshape(-1, 1, 1)
    # P(lo x < Z < hi x) for a standard normal Z, from the near tail so nothing cancels
    # (the error terms are tiny at high SNR; the straddling interval has Hamming distance 0).
    with np.errstate(invalid="ignore"):
        below = special.ndtr(hi * xx) - special.ndtr(lo * xx)
        above = _qfunc(lo * xx) - _qfunc(hi * xx)
    prob = np.where(hi <= 0, below, above)
    errs = (prob * ham).sum(axis=(1, 2)) / m
    return errs.reshape(x.shape)


def qam_ber(bits_per_symbol: int, es_n0) -> np.ndarray:
    """Exact bit error probability of Gray-coded square or rectangular QAM on AWGN.

    Parameters
    ----------
    bits_per_symbol : int
        Bits per QAM symbol (see :func:`qam_ser` for the grid used).
    es_n0 : float or array_like
        Average symbol energy over N0, linear (``Eb/N0 = Es/N0 / bits_per_symbol``).

    Returns
    -------
    ndarray
        Bit error probability, same shape as ``es_n0``.

    Notes
    -----
    Each dimension is a Gray-coded PAM decided separately; the bit errors of each are summed
    exactly over transmitted levels and decision intervals. This equals the closed form of Cho
    and Yoon, "On the general BER expression of one- and two-dimensional amplitude modulations",
    IEEE Trans. Commun. 50(7), 2002, which the tests check it against.
    """
    m_i, m_q = _grid_shape(bits_per_symbol)
    x = np.atleast_1d(_half_distance(es_n0, m_i, m_q))
    errs = _gray_pam_bit_errors(m_i, x) + _gray_pam_bit_errors(m_q, x)
    out = errs / bits_per_symbol
    return out.reshape(np.shape(es_n0))


def grid_ser(bits, es_n0) -> np.ndarray:
    """Symbol error rate of the rectangular QAM grid per tone, 0 bits included (error rate 0).

    Parameters
    ----------
    bits : array_like of int
        Bits per symbol, 0..MAX_BITS, broadcast against ``es_n0``.
    es_n0 : array_like of float
        Average symbol energy over N0, linear (negative values count as 0).

    Returns
    -------
    ndarray
        ``1 - (1 - P_I)(1 - P_Q)`` with the M-PAM error ``P = 2 (1 - 1/M) Q(d / sqrt(2 N0))``
        per axis (Proakis, Digital Communications, 5th ed., sec. 4.3), elementwise: the closed
        form behind :func:`qam_ser`, for arrays of bit counts.
    """
    b = np.asarray(bits)
    if b.size and (b.min() < 0 or b.max() > MAX_BITS):
        raise InputError(f"bits must be in 0..{MAX_BITS}")
    b = b.astype(np.int64)
    m_i = np.left_shift(1, (b + 1) // 2)
    m_q = np.left_shift(1, b // 2)
    energy = np.maximum(m_i * m_i + m_q * m_q - 2, 1)  # 0 bits: one point, no error below
    x = np.sqrt(6.0 * np.maximum(np.asarray(es_n0, dtype=np.float64), 0.0) / energy)
    q = _qfunc(x)
    p_i = 2.0 * (1.0 - 1.0 / m_i) * q
    p_q = 2.0 * (1.0 - 1.0 / m_q) * q  # 0 where the grid has one level on Q (BPSK, 0 bits)
    return p_i + p_q - p_i * p_q  # = 1 - (1 - p_i)(1 - p_q), without cancelling
