"""Bit and power loading over OFDM tones: water-filling and discrete (Levin-Campello) loading.

The QAM theory it rests on (the SNR gap, error rates) is :mod:`brimline.daemon.core.qam`.

Conventions shared by everything here (other modules and the tests rely on them):

* ``snr`` is the **linear** per-tone SNR at nominal per-tone transmit power, a float array (N,).
  An SNR of 0 is legal: that tone never loads.
* A tone carrying ``b`` bits needs power ``gap * (2**b - 1) / snr`` (``gap`` linear, any target
  margin and coding gain already folded into it), relative to nominal. 0-bit tones get 0 power.
* The total budget is ``N * 10**(budget_db / 10)`` (N tones at nominal scaled by ``budget_db``);
  each tone's power is at most ``10**(cap_db / 10)`` (``cap_db = inf``: no ceiling).
* ``margin_db`` of an allocation is the largest uniform factor, in dB, by which every loaded
  tone's *required* power could grow and still fit the budget and the ceilings (``+inf`` when
  nothing is loaded).

The discrete loaders work on each tone's energy-versus-bits table. The table is the same for
every tone up to the factor ``gap / snr``, so the per-bit tables (step sizes, incremental
energies, their efficiencies) are built once by :class:`Loader` and every frame costs a few
vectorized passes over the tones plus one small sort. Consecutive bit sets climb the *ladder*
of cost levels read off the floating-point bit patterns (:class:`_Ladder`, ``_cut``,
``_climb``); sets with holes take a threshold search (``_rate_steps``, ``_margin_steps``).
These and ``_water_level`` are private helpers that the tests call directly.

Ties: when increments on different tones cost exactly the same, the lower tone index takes
its increment first, as the greedy reference does (``_greedy_oracle``: its ``argmin`` returns
the first minimum), so for consecutive bit sets the allocation equals the greedy one bit for
bit, not merely in total. The one exception is a budget equal to the power of an allocation to
within rounding (about 1e-16 relative): whether that last increment fits then depends on the
order of summation, which differs (the greedy adds increment by increment; the loader sums the
powers per tone), and the two may differ by that one increment.
"""

from __future__ import annotations

import functools
import math
import struct
import threading
from dataclasses import dataclass
from typing import Iterable, NamedTuple

import numpy as np

from brimline.daemon.core.qam import MAX_BITS
from brimline.daemon.errors import InfeasibleError, InputError
from brimline.daemon.limits import check_db
from brimline.daemon.records import Allocation, frozen_array

__all__ = [
    "allowed_bits",
    "check_target_bits",
    "uniform_margin_db",
    "Waterfill",
    "waterfill",
    "load_rate",
    "load_margin",
    "Loader",
]

# --------------------------------------------------------------------------- validation


def _as_snr(snr) -> np.ndarray:
    """Validate a linear per-tone SNR array; return it as float64 (N,)."""
    return _checked_snr(snr)[0]


def _checked_snr(snr) -> tuple[np.ndarray, float, float]:
    """Validate a linear per-tone SNR array; return it as float64 (N,), its least and its
    greatest value (0, 0 when empty)."""
    try:
        arr = np.asarray(snr, dtype=np.float64)
    except (TypeError, ValueError):
        raise InputError(f"snr must be an array of numbers, got {type(snr).__name__}") from None
    if arr.ndim != 1:
        raise InputError(f"snr must be 1-D (one value per tone), got shape {arr.shape}")
    if arr.size:
        low, high = float(np.minimum.reduce(arr)), float(np.maximum.reduce(arr))
        if low >= 0.0 and high < math.inf:
            return arr, low, high  # the usual case, two cheap passes (a NaN fails the first)
    bad = ~(np.isfinite(arr) & (arr >= 0.0))
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise InputError(f"snr[{i}]={float(arr[i])!r} must be finite and >= 0 (linear SNR)")
    return arr, 0.0, 0.0


@dataclass(frozen=True)
class _BitTables:
    """Per-bit tables of one allowed-bits set, shared by every loader that uses the set."""

    bits: np.ndarray         # (J,) allowed bits, ascending from 0
    energy: np.ndarray       # (J,) 2**b - 1: a tone's power in units of gap/snr
    pow2: np.ndarray         # (J,) 2**b: the table the energy formula gathers from
    step_energy: np.ndarray  # (J-1,) energy of the step from bits[j] to bits[j+1]
    step_bits: np.ndarray    # (J-1,) bits gained by that step
    step_key: np.ndarray     # (J-1,) log2 of the step's energy per bit (increasing)
    unit_steps: bool         # consecutive bits: every step is one bit
    max_step: int
    mean_step: float
    key_spacing: float       # smallest gap between consecutive step keys


def allowed_bits(bits, *, key: str = "bits", shown: str | None = None,
                 error: type[Exception] = ValueError) -> tuple[int, ...]:
    """Check an allowed-bits set: integers, strictly ascending, starting at 0, at most MAX_BITS.

    The one rule for the bit counts a loader may use; the ``loading.bits`` config key, the
    :class:`Loader`, the ``plan`` command's ``--bits`` and the transmitter's :class:`Follower`
    all apply it. Holes are allowed (``0, 1, 2, 4, 6, 8``).

    Parameters
    ----------
    bits : iterable of int
        The set, in order.
    key : str
        Its name in the message (``bits``, ``--bits``).
    shown : str, optional
        The value as the user wrote it, for the message (``'0-8'``); default: the list.
    error : exception class
        Raised when the set breaks the rule (``InputError`` for user input outside a config).

    Returns
    -------
    tuple of int

    Examples
    --------
    >>> allowed_bits(range(4))
    (0, 1, 2, 3)
    """
    try:
        values = tuple(bits)
    except TypeError:
        raise error(f"{key}={bits!r} must be a list of integers") from None
    if not values or not all(isinstance(b, (int, np.integer)) and not isinstance(b, bool)
                             for b in values):
        raise error(f"{key}={list(values)!r} must be a non-empty list of integers")
    values = tuple(int(b) for b in values)
    if values[0] != 0 or any(b <= a for a, b in zip(values, values[1:])) \
            or values[-1] > MAX_BITS:
        shown = repr(list(values)) if shown is None else shown
        raise error(f"{key}={shown} must be ascending, start at 0 and stay <= {MAX_BITS}")
    return values


def uniform_margin_db(need: np.ndarray, budget: float, cap: float, *,
                      total: float | None = None) -> float:
    """Largest uniform growth of the required powers within budget and ceiling, dB.

    Parameters
    ----------
    need : ndarray
        Required power per tone, linear (0 on unloaded tones).
    budget : float
        Total power budget, linear.
    cap : float
        Per-tone ceiling, linear (``inf``: none).
    total : float, optional
        ``need.sum()``, when the caller has it already.

    Returns
    -------
    float
        ``10 log10(min(budget / sum(need), cap / max(need)))``; ``+inf`` when nothing is loaded.
        This is an allocation's ``margin_db`` (see the module notes), for the loader and for
        change control's bit swaps alike.
    """
    if total is None:
        total = float(need.sum())
    if total <= 0.0:
        return math.inf
    factor = budget / total
    if math.isfinite(cap):
        factor = min(factor, cap / float(np.maximum.reduce(need)))
    return 10.0 * math.log10(factor)


def check_target_bits(target_bits, *, error: type[Exception] = ValueError) -> int:
    """``target_bits`` (bits per OFDM symbol of margin mode) as an int: an integer >= 0."""
    if isinstance(target_bits, bool) or not isinstance(target_bits, (int, np.integer)) \
            or target_bits < 0:
        raise error(f"target_bits={target_bits!r} must be an integer >= 0")
    return int(target_bits)


def _as_bit_set(bits) -> _BitTables:
    """Validate an allowed-bits set (see :func:`allowed_bits`) and return its tables."""
    return _bit_tables(allowed_bits(bits, error=InputError))


@functools.lru_cache(maxsize=64)
def _bit_tables(values: tuple[int, ...]) -> _BitTables:
    bits = np.array(values, dtype=np.int64)
    levels = np.ldexp(1.0, bits)
    step_energy = np.diff(levels)
    step_bits = np.diff(bits)
    step_key = np.log2(step_energy / step_bits)
    tables = _BitTables(
        bits=bits, energy=levels - 1.0, pow2=levels, step_energy=step_energy,
        step_bits=step_bits,
        step_key=step_key, unit_steps=bool(np.all(step_bits == 1)),
        max_step=int(step_bits.max()) if step_bits.size else 1,
        mean_step=float(step_bits.mean()) if step_bits.size else 1.0,
        key_spacing=float(np.diff(step_key).min()) if step_key.size > 1 else 1.0)
    for table in (tables.bits, tables.energy, tables.pow2, tables.step_energy,
                  tables.step_bits, tables.step_key):
        table.setflags(write=False)
    return tables


# --------------------------------------------------------------------------- water-filling


@dataclass(frozen=True)
class Waterfill:
    """Result of continuous water-filling.

    Attributes
    ----------
    power : ndarray of float64
        Power per tone, linear, relative to nominal.
    water_level : float
        The level ``mu`` with ``power = clip(mu - gap/snr, 0, cap)`` (linear, relative to
        nominal); ``nan`` when no tone can take power (all SNR 0).
    capacity_bits : float
        ``sum(log2(1 + power * snr / gap))``, bits per OFDM symbol.
    """

    power: np.ndarray
    water_level: float
    capacity_bits: float

    def __post_init__(self) -> None:
        object.__setattr__(self, "power", frozen_array(self.power, np.float64, "power"))
        object.__setattr__(self, "water_level", float(self.water_level))
        object.__setattr__(self, "capacity_bits", float(self.capacity_bits))


def _water_level(floor_lin: np.ndarray, budget: float, cap: float) -> float:
    """Exact water level for ``sum(clip(mu - floor_lin, 0, cap)) = budget``.

    ``floor_lin`` holds ``gap / snr`` of the tones that can take power (finite, > 0). The total
    is piecewise linear in ``mu`` with breakpoints at ``floor_lin`` (slope +1) and
    ``floor_lin + cap`` (slope -1); the breakpoints are sorted once and the segment holding the
    budget is solved in closed form. When the ceilings hold less than the budget the lowest
    level that fills every tone to its ceiling is returned.
    """
    n = floor_lin.size
    if n == 0:
        return math.nan
    if math.isfinite(cap):
        if cap * n <= budget:
            return float(floor_lin.max() + cap)
        points = np.concatenate([floor_lin, floor_lin + cap])
        delta = np.concatenate([np.ones(n), -np.ones(n)])
    else:
        points = floor_lin
        delta = np.ones(n)
    order = np.argsort(points, kind="stable")
    pts = points[order]
    slope = np.cumsum(delta[order])  # slope just after each breakpoint
    filled = np.concatenate([[0.0], np.cumsum(slope[:-1] * np.diff(pts))])  # total at each point
    k = int(np.searchsorted(filled, budget, side="left"))  # first breakpoint reaching it
    if k < pts.size and filled[k] == budget:  # also the start of a plateau at the budget
        return float(pts[k])
    k -= 1  # the budget lies inside the segment after breakpoint k, whose slope is > 0
    return float(pts[k] + (budget - filled[k]) / slope[k])


def waterfill(snr, *, gap_db: float = 0.0, budget_db: float = 0.0,
              cap_db: float = math.inf) -> Waterfill:
    """Continuous water-filling of the power budget over the tones, with a per-tone ceiling.

    Parameters
    ----------
    snr : array_like of float
        Linear per-tone SNR at nominal power, (N,), finite and >= 0.
    gap_db : float
        SNR gap in dB (0 for the Shannon capacity).
    budget_db : float
        Total power relative to N tones at nominal, dB.
    cap_db : float
        Per-tone power ceiling relative to nominal, dB (``inf``: none).

    Returns
    -------
    Waterfill
        Powers, water level and ``capacity_bits``.

    Raises
    ------
    InputError
        Bad SNR values or dB values.

    Notes
    -----
    Maximises ``sum log2(1 + p_k snr_k / gap)`` subject to ``sum p_k <= P`` and ``p_k <= cap``:
    ``p_k = clip(mu - gap/snr_k, 0, cap)`` (Cover and Thomas, Elements of Information Theory,
    sec. 9.4; Goldsmith, Wireless Communications, eqs. 4.24-4.26). The level is found exactly
    by :func:`_water_level`, with no iteration count to tune.

    Examples
    --------
    >>> wf = waterfill([1.0, 0.5, 0.25], budget_db=0.0)  # noise 1, 2, 4; P = 3
    >>> wf.water_level, wf.power.tolist()
    (3.0, [2.0, 1.0, 0.0])
    """
    snr = _as_snr(snr)
    gap = 10.0 ** (check_db("gap_db", gap_db, error=InputError) / 10.0)
    budget = snr.size * 10.0 ** (check_db("budget_db", budget_db, error=InputError) / 10.0)
    cap = 10.0 ** (check_db("cap_db", cap_db, allow_pos_inf=True, error=InputError) / 10.0)
    active = snr > 0.0
    floor_lin = gap / snr[active]
    mu = _water_level(floor_lin, budget, cap)
    power = np.zeros(snr.size)
    if active.any():
        power[active] = np.clip(mu - floor_lin, 0.0, cap)
    capacity = float(np.log2(1.0 + power[active] * snr[active] / gap).sum())
    return Waterfill(power=power, water_level=mu, capacity_bits=capacity)


# --------------------------------------------------------------------------- discrete loading

#: First step of the threshold walk past a Newton estimate, in key spacings: small, so that the
#: bracket (and the sort of the tones with a step inside it) stays narrow, but enough to cross.
_OVERSHOOT = 1.0 / 64.0
#: A bracket at most this wide (in key spacings) skips the interpolated probe.
_NARROW = 1.0 / 16.0


@dataclass(frozen=True)
class _Tones:
    """Per-frame quantities of the tones, derived from the SNR and the loader's tables.

    A tone that cannot take even its first step within the ceiling and the whole budget is
    *unloadable*: ``unit`` 0, ``log_unit`` +inf, ``top`` 0.
    """

    unit: np.ndarray      # gap / snr: power per unit of (2**b - 1)
    log_unit: np.ndarray  # log2(unit)
    top: np.ndarray       # highest index into the bit set the ceiling (and budget) allow
    top_f: np.ndarray     # top as float64, for the unit-step search
    unit_sum: float       # sum(unit): the energy of n steps is dot(unit, 2**n) - unit_sum


#: Leading mantissa bits that, with the exponent, name a cost level of the ladder (below):
#: 2**5 = 32 levels per octave. More levels make a longer table; fewer put more tones on the
#: level that is cut, which is sorted (about 1/32 of them).
_LEVEL_BITS = 5
_LEVEL_SHIFT = 52 - _LEVEL_BITS
_PER_OCTAVE = 1 << _LEVEL_BITS


def _pattern(x: float) -> int:
    """IEEE 754 bit pattern of a positive double, as an int (it orders like the value)."""
    return struct.unpack("<q", struct.pack("<d", x))[0]


@functools.lru_cache(maxsize=256)
def _row_scale(rows: int, first: int, step: int = 1) -> np.ndarray:
    """``2**(first + step * r)`` for rows ``r = 0 .. rows - 1``, as a column (read-only).

    With ``first = 1 - rows`` it is relative to the top row and cannot overflow; far rows
    underflow to 0, which only makes the level table (a guide) ignore costs below 2**-1000 of
    the top row's. With ``first = -octave0, step = -1`` it undoes the exponents of the rows'
    costs, which lie within the range of normal doubles.
    """
    scale = np.exp2(first + step * np.arange(rows, dtype=np.float64))[:, None]
    scale.setflags(write=False)
    return scale


class _Ladder(NamedTuple):
    """Per-frame increments of a consecutive bit set, on the ladder of cost levels.

    Tone ``i``'s ``k``-th increment (from ``k`` to ``k + 1`` bits) costs ``unit_i * 2**k``.
    Scaling by ``2**k`` adds ``k`` to the exponent field, so the cost's bit pattern is
    ``pattern(unit_i) + (k << 52)``, and patterns of positive doubles order like the values.
    A *level* is a pattern shifted right by ``_LEVEL_SHIFT`` (the exponent and the leading
    ``_LEVEL_BITS`` mantissa bits): the increments of tone ``i`` sit on levels
    ``level_i + k * _PER_OCTAVE``, every increment on a lower level is cheaper than every one
    on a higher level, and inside a level the full cost decides.
    """

    unit: np.ndarray    # gap / snr, clamped to 2 * limit (such a tone never loads either way)
    level: np.ndarray   # int64 level of each tone's first increment, counted from row 0
    top: np.ndarray | None  # int64 most bits per tone within the limit; None: not decided yet
    span: np.ndarray    # int64 top * _PER_OCTAVE (every top = the bit set's last until decided)
    limit: float        # per-tone power limit: min(ceiling, budget)
    half: int           # the level holding limit / 2: on lower levels no limit binds
    octave0: int        # unbiased exponent of the costs on row 0 (levels 0 .. _PER_OCTAVE-1)
    rows: int           # octaves in the level table: every increment lies on a lower level
    work: _Scratch      # the arrays above live here


class _Scratch:
    """One thread's work arrays for the ladder, for frames of ``size`` tones.

    Reused from call to call: allocating a dozen arrays of a frame's size on every call costs
    more than the arithmetic. Nothing here leaves the loader (the records copy their arrays).
    ``zeros``, ``last``, ``last_span`` and ``ceiling`` are constants: array operands keep the
    element-wise
    minimum and maximum on numpy's contiguous fast path, where a scalar operand does not.
    """

    def __init__(self, size: int, last: int, ceiling: float) -> None:
        self.size = size
        self.unit = np.empty(size)
        self.need = np.empty(size)
        self.level, self.top, self.span, self.stop, self.n, self.spare = \
            np.empty((6, size), dtype=np.int64)
        self.flag = np.empty(size, dtype=bool)
        self.zeros = np.zeros(size, dtype=np.int64)
        self.last = np.full(size, last, dtype=np.int64)
        self.last_span = self.last << _LEVEL_BITS
        self.ceiling = np.full(size, ceiling)


class Loader:
    """Precomputed discrete bit loader, called once per frame with the per-tone SNR.

    Parameters
    ----------
    mode : {"rate", "margin", "waterfill"}
        ``rate``: the most bits within budget and ceilings. ``margin``: exactly ``target_bits``
        with the least power, then every loaded tone's power scaled up by the largest uniform
        margin. ``waterfill``: continuous water-filling, each tone's bits rounded down to the
        allowed set, the water-filled power kept on loaded tones.
    bits : iterable of int
        Allowed bits per tone, ascending, starting at 0, at most :data:`MAX_BITS`. Holes are
        allowed (e.g. ``0, 1, 2, 4, 6, 8``).
    gap_db : float
        SNR gap in dB, coding gain and target margin included.
    budget_db : float
        Total power relative to N tones at nominal, dB.
    cap_db : float
        Per-tone power ceiling relative to nominal, dB (``inf``: none).
    target_bits : int, optional
        Bits per OFDM symbol for ``mode="margin"`` (required there).

    Notes
    -----
    Each tone's power for ``b`` bits is ``u * (2**b - 1)`` with ``u = gap / snr``, so one table
    of steps serves every tone: step ``j`` goes from ``bits[j]`` to ``bits[j + 1]`` and costs
    ``u * (2**bits[j+1] - 2**bits[j])``, i.e. ``u * eff_j`` per bit. The efficiencies grow with
    ``j`` because ``2**b`` is convex, so each tone's table is its own lower convex hull.

    *Rate mode* gives the allocation that Levin-Campello loading defines (Campello,
    "Practical bit loading for DMT", ICC 1999: efficient, i.e. no bit moved between tones saves
    power, and E-tight, i.e. no further bit fits), without Levin-Campello's bit-by-bit
    iteration. For consecutive bit sets every step is one bit and costs ``u * 2**k``: the
    increments are taken cheapest first (ties to the lower tone index) while they fit, found
    on the ladder of cost levels (:meth:`_climb`), which gives Hughes-Hartogs greedy loading's
    result exactly. For sets with holes, at a Lagrange threshold ``t`` on ``log2`` of the cost
    per bit a tone takes every step with ``log2(u) + log2(eff_j) <= t``, a closed form per tone.
    A search on ``t`` (a first guess, doubling steps, bisection until the bracket is narrower
    than the spacing of the ``log2(eff_j)`` so that no tone has two steps inside it, one
    interpolated probe) brackets the budget; the steps inside the bracket are sorted by
    efficiency and taken while they fit. (With unit steps that search too would be exactly
    optimal; the ladder is faster and settles ties as the greedy reference does.) With holes
    it is the Lagrangian (convex-hull) solution and is within ``max_step - 1`` bits
    of the optimum (one bit for ``0, 1, 2, 4, 6, 8``), since the continuous relaxation over the
    hull exceeds it by less than the one step that did not fit.

    *Margin mode*: the same climb (or search) on the bit count gives the least power for
    exactly ``target_bits`` (exact for consecutive sets: the ``target_bits`` cheapest
    increments). With holes, a remainder smaller than the next
    step is filled by the cheapest single step of the right size, or a step up on one tone and
    down on another; the power is then near-minimal, not guaranteed minimal.

    Rate mode does not spread leftover power: loaded tones get their required power and
    ``margin_db`` reports the headroom.

    The settings are fixed once built (attributes ``mode``, ``bits``, ``gap_db``,
    ``budget_db``, ``cap_db``, ``target_bits`` are read-only); build another loader to change
    them. Calls keep no state between frames; the only thing kept is each thread's work arrays
    (reused, never returned), so one loader may serve many threads.
    """

    def __init__(self, *, mode: str = "rate", bits: Iterable[int] = range(9), gap_db: float,
                 budget_db: float = 0.0, cap_db: float = math.inf,
                 target_bits: int | None = None) -> None:
        if mode not in ("rate", "margin", "waterfill"):
            raise InputError(f"mode={mode!r} must be one of rate, margin, waterfill")
        tables = _as_bit_set(bits)
        gap_db = check_db("gap_db", gap_db, error=InputError)
        budget_db = check_db("budget_db", budget_db, error=InputError)
        cap_db = check_db("cap_db", cap_db, allow_pos_inf=True, error=InputError)
        if target_bits is not None:
            target_bits = check_target_bits(target_bits, error=InputError)
        if mode == "margin" and target_bits is None:
            raise InputError("target_bits is required with mode='margin'")
        gap = 10.0 ** (gap_db / 10.0)
        settings = {
            "mode": mode, "bits": tables.bits, "gap_db": gap_db, "budget_db": budget_db,
            "cap_db": cap_db, "target_bits": target_bits,
            "_gap": gap, "_log2_gap": math.log2(gap),
            "_per_tone_budget": 10.0 ** (budget_db / 10.0), "_cap": 10.0 ** (cap_db / 10.0),
            # Tables over the bit set (cached per set, read-only): see _BitTables.
            "_energy": tables.energy, "_pow2": tables.pow2,
            "_step_energy": tables.step_energy,
            "_step_bits": tables.step_bits, "_step_key": tables.step_key,
            "_unit_steps": tables.unit_steps, "_max_step": tables.max_step,
            "_mean_step": tables.mean_step, "_key_spacing": tables.key_spacing,
            "_per_thread": threading.local(),  # work arrays (see _Scratch), not settings
        }
        self.__dict__.update(settings)
        self._frozen = True

    def __setattr__(self, name: str, value) -> None:
        if getattr(self, "_frozen", False):  # the tables follow from the settings
            raise AttributeError(f"Loader settings are fixed; build a new Loader to change {name}")
        object.__setattr__(self, name, value)

    def __repr__(self) -> str:
        return (f"Loader(mode={self.mode!r}, bits={self.bits.tolist()}, gap_db={self.gap_db}, "
                f"budget_db={self.budget_db}, cap_db={self.cap_db}, "
                f"target_bits={self.target_bits})")

    # ---------------------------------------------------------------- per-tone helpers

    def _tones(self, snr: np.ndarray, budget: float) -> _Tones:
        with np.errstate(divide="ignore"):
            log_unit = self._log2_gap - np.log2(snr)  # +inf where the SNR is 0
            unit = self._gap / snr
        # Step j is allowed when unit * (2**b_j - 1) fits the ceiling and the whole budget.
        # Excluding tones that could never load also keeps unit_sum small next to the budget,
        # so the energy formula of _energy_of loses nothing to cancellation.
        last = self.bits.size - 1
        if math.isfinite(self._cap) or last == 0:
            room = min(self._cap, budget) / unit
            if self._unit_steps:
                top = self._unit_top(room, last)
            else:
                top = np.searchsorted(self._energy, room, side="right") - 1
            dead = top == 0
            top_f = top.astype(np.float64)
        else:  # only the budget limits a tone: drop those that cannot afford the first step
            dead = unit > budget / self._energy[1]
            if dead.any():
                top = np.where(dead, 0, last)
                top_f = top.astype(np.float64)
            else:
                top = np.full(unit.size, last, dtype=np.int64)
                top_f = np.full(unit.size, float(last))
        if dead.any():
            unit[dead] = 0.0
            log_unit[dead] = np.inf
        return _Tones(unit=unit, log_unit=log_unit, top=top, top_f=top_f,
                      unit_sum=float(unit.sum()))

    def _unit_top(self, room: np.ndarray, last: int) -> np.ndarray:
        """``searchsorted(energy, room, "right") - 1`` for consecutive bit sets, cheaper.

        With ``energy = 2**b - 1`` the answer is ``floor(log2(room + 1))``, which ``frexp``
        reads off the exponent exactly. Rounding ``room + 1`` can only carry it up to the next
        power of two, so one comparison against the exact table settles it. A truncated table
        (the ceiling) then costs a third of a binary search per tone.
        """
        top = np.frexp(room + 1.0)[1].astype(np.int64)
        top -= 1
        np.minimum(top, last, out=top)
        top -= self._energy[top] > room
        return top

    def _steps_at(self, tones: _Tones, t: float) -> np.ndarray:
        """Steps each tone takes at threshold ``t`` (log2 of the cost per bit), capped.

        Unit-step sets return float64 counts (exact integers) for the cheap energy formula.
        """
        if self._unit_steps:  # keys are 0, 1, 2, ...: a floor does the search
            n = np.subtract(t + 1.0, tones.log_unit)
            np.floor(n, out=n)
            np.maximum(n, 0.0, out=n)  # two ufuncs are cheaper than np.clip here
            np.minimum(n, tones.top_f, out=n)
            return n
        n = np.searchsorted(self._step_key, t - tones.log_unit, side="right")
        np.minimum(n, tones.top, out=n)
        return n

    def _energy_of(self, tones: _Tones, n: np.ndarray) -> float:
        """Total required power of ``n`` steps per tone, linear."""
        if self._unit_steps:  # a gather from the 2**b table is far cheaper than exp2
            return float(np.dot(tones.unit, self._pow2[n.astype(np.intp)])) - tones.unit_sum
        return float(np.dot(tones.unit, self._energy[n]))

    def _bits_of(self, n: np.ndarray) -> int:
        if self._unit_steps:
            return int(n.sum())
        return int(self.bits[n].sum())

    def required_power(self, bits, snr) -> np.ndarray:
        """Power each tone needs for its bits: ``gap * (2**bits - 1) / snr`` (0 for 0 bits).

        Parameters
        ----------
        bits : array_like of int
            Bits per tone, (N,).
        snr : array_like of float
            Linear per-tone SNR at nominal power, (N,).

        Returns
        -------
        ndarray of float64
            Linear power relative to nominal; ``inf`` where bits > 0 on a tone with SNR 0.
        """
        snr = _as_snr(snr)
        b = np.asarray(bits, dtype=np.int64)
        if b.shape != snr.shape:
            raise InputError(f"bits has shape {b.shape}, snr has shape {snr.shape}")
        need = self._gap * (np.ldexp(1.0, b) - 1.0)
        with np.errstate(divide="ignore", invalid="ignore"):
            out = np.where(b > 0, need / snr, 0.0)
        return out

    def tone_margin_db(self, bits, power, snr) -> np.ndarray:
        """Per-tone margin in dB: ``10*log10(power / required_power)``, ``+inf`` for 0 bits."""
        need = self.required_power(bits, snr)
        p = np.asarray(power, dtype=np.float64)
        if p.shape != need.shape:
            raise InputError(f"power has shape {p.shape}, snr has shape {need.shape}")
        with np.errstate(divide="ignore", invalid="ignore"):
            out = np.where(need > 0, 10.0 * np.log10(p / np.where(need > 0, need, 1.0)), np.inf)
        return out

    def _budget(self, n_tones: int) -> float:
        return n_tones * self._per_tone_budget

    def _margin(self, need: np.ndarray, budget: float) -> float:
        """Largest uniform growth factor of the required powers, in dB (+inf if none loaded)."""
        return uniform_margin_db(need, budget, self._cap)

    # ---------------------------------------------------------------- the ladder

    def _scratch(self, size: int, budget: float) -> _Scratch:
        """This thread's work arrays for ``size`` tones (made on first use)."""
        work = getattr(self._per_thread, "work", None)
        if work is None or work.size != size:
            work = _Scratch(size, self.bits.size - 1, 2.0 * min(self._cap, budget))
            self._per_thread.work = work
        return work

    def _ladder(self, snr: np.ndarray, snr_min: float, snr_max: float,
                budget: float) -> _Ladder | None:
        """The cost ladder of a consecutive bit set, or None when it does not apply.

        It does not apply when some cost would be a subnormal double (``gap / snr`` below about
        ``2**-960``, an SNR near 2900 dB): then the exponent no longer moves with ``2**k``.
        The tops are left undecided (see :meth:`_with_tops`).
        """
        limit = min(self._cap, budget)
        ceiling = 2.0 * limit
        # The least unit is gap / snr_max (division is monotonic), clamped like the rest.
        first = _pattern(min(self._gap / snr_max, ceiling) if snr_max > 0.0 else ceiling)
        if first >> 52 == 0 and snr.size:  # exponent field 0: a subnormal (or zero) unit
            return None
        work = self._scratch(snr.size, budget)
        unit = work.unit
        if snr_min > 0.0 and self._gap / snr_min <= ceiling:
            np.divide(self._gap, snr, out=unit)
        else:  # some tones never load (zero SNR among them): clamp their units, same verdict
            with np.errstate(divide="ignore", over="ignore"):
                np.divide(self._gap, snr, out=unit)
            np.minimum(unit, work.ceiling, out=unit)
        pattern = unit.view(np.int64)
        base = first >> _LEVEL_SHIFT & -_PER_OCTAVE  # row 0 starts an octave
        level = np.right_shift(pattern, _LEVEL_SHIFT, out=work.level)
        level -= base
        rows = ((_pattern(ceiling) >> _LEVEL_SHIFT) - base >> _LEVEL_BITS) + self.bits.size
        return _Ladder(unit=unit, level=level, top=None,
                       span=work.last_span, limit=limit,
                       half=(_pattern(0.5 * limit) >> _LEVEL_SHIFT) - base,
                       octave0=(base >> _LEVEL_BITS) - 1023, rows=rows, work=work)

    def _with_tops(self, ladder: _Ladder) -> _Ladder:
        """The ladder with each tone's top decided: the most bits within the limit.

        The largest b with unit * (2**b - 1) <= limit, decided by the greedy reference's own
        comparison. t = floor(log2(2 * limit / unit)) comes exactly from the patterns (exponents
        subtract, the mantissa comparison borrows); unit * 2**t (exact, at most 2 * limit) is a
        pattern sum, and unit * 2**t - unit rounds once, as the product unit * (2**t - 1) does.
        The top is t when that fits, else t - 1: the sign bit of limit - (unit * 2**t - unit),
        shifted down, is that -1 or 0.
        """
        work, unit, limit = ladder.work, ladder.unit, ladder.limit
        pattern = unit.view(np.int64)
        top = np.subtract(_pattern(2.0 * limit), pattern, out=work.top)
        top >>= 52
        over = np.left_shift(top, 52, out=work.spare)
        over += pattern
        excess = over.view(np.float64)
        excess -= unit
        np.subtract(limit, excess, out=excess)
        over >>= 63
        top += over
        np.minimum(top, work.last, out=top)
        span = np.left_shift(top, _LEVEL_BITS, out=work.span)
        return ladder._replace(top=top, span=span)

    def _cut(self, ladder: _Ladder, budget: float, target: int | None,
             entering: np.ndarray | None = None):
        """The level where the budget (or the target) is crossed, and what is left below it.

        The level table (see :meth:`_climb`); returns ``(cut, room, entering)``, the last the
        entering histogram, which a second call for the same frame may pass back in (it does
        not depend on the tops). Rate mode weighs each
        tone by its unit, the cost of its first increment; divided by ``2**e`` for the exponent
        ``e`` of its row, that is the mantissa, the same on every row the tone climbs through.
        Before the tops are decided every tone leaves ``last`` rows after it enters, so the
        leaving histogram is the entering one moved down ``last`` rows.
        """
        level, rows, work = ladder.level, ladder.rows, ladder.work
        size = rows << _LEVEL_BITS
        rate = target is None
        if entering is None:
            entering = np.bincount(level, weights=ladder.unit if rate else None,
                                   minlength=size).reshape(rows, _PER_OCTAVE)
            if rate:
                entering = entering * _row_scale(rows, -ladder.octave0, -1)  # mantissa sums
        table = entering.copy()
        if ladder.top is None:
            last = self.bits.size - 1
            table[last:] -= table[:rows - last].copy()
        else:
            stop = np.add(ladder.span, level, out=work.stop)
            leaving = None
            if rate:  # weigh by the cost of the first increment not taken: unit * 2**top
                leaving = np.left_shift(ladder.top, 52, out=work.spare)
                leaving += ladder.unit.view(np.int64)
                leaving = leaving.view(np.float64)
            out = np.bincount(stop, weights=leaving, minlength=size).reshape(rows, _PER_OCTAVE)
            if rate:
                out = out * _row_scale(rows, -ladder.octave0, -1)
            table -= out
        table = np.add.accumulate(table, axis=0)  # present on each level
        if rate:
            table *= _row_scale(rows, 1 - rows)  # in units of the top row's octave
            unit_exp = ladder.octave0 + rows - 1
            limit = math.ldexp(budget, -unit_exp)
        else:
            unit_exp, limit = 0, target
        total = np.add.accumulate(table.ravel())
        cut = int(total.searchsorted(limit, side="right"))
        room = limit - (float(total[cut - 1]) if cut else 0.0)
        return cut, (math.ldexp(room, unit_exp) if rate else int(round(room))), entering

    def _climb(self, ladder: _Ladder, budget: float, target: int | None = None):
        """Steps per tone, the cheapest increments first, and each tone's required power.

        Rate mode (``target`` None): the increments that fit ``budget`` when taken in order of
        cost; margin mode: the ``target`` cheapest ones. Equal costs go to the lower tone index,
        as in the greedy reference (Hughes-Hartogs), whose ``argmin`` takes the first minimum.

        A table over the levels holds the cost (rate) or number (margin) of the increments on
        each level, from two histograms: tone ``i`` enters at ``level_i`` and leaves at
        ``level_i + top_i * 32``; a running sum down each column of the (octave, level) table
        gives the tones present, whose cost doubles per row. Its cumulative sum finds the level
        where the budget or the target is crossed (the cut): every increment below the cut is
        taken, a closed form per tone, and only the increments on the cut level are sorted.
        Rounding of the table matters only where the budget is met to within rounding: the
        power is summed again from the tones, and the dearest increments taken (then the cut)
        give way while that sum is over the budget.

        Returns ``(n, need, spent)``: int64 steps (= bits), float64 power per tone and its sum.
        """
        cut, room, entering = self._cut(ladder, budget, target)
        if ladder.top is None and cut >= ladder.half:  # the limit may bind below the cut
            ladder = self._with_tops(ladder)
            cut, room, _ = self._cut(ladder, budget, target, entering)
        level, span, unit, work = ladder.level, ladder.span, ladder.unit, ladder.work
        energy = self._energy
        while True:
            # Steps below the cut: ceil((cut - level) / 32) within 0 .. top, from x = cut + 31 -
            # level clipped to 0 .. 32 * top. A tone has an increment on the cut level itself
            # exactly when x = 32 k + 31 after clipping (the clip leaves no false ones).
            n = np.subtract(cut + _PER_OCTAVE - 1, level, out=work.n)
            np.maximum(n, work.zeros, out=n)
            np.minimum(n, span, out=n)
            residue = np.bitwise_and(n, _PER_OCTAVE - 1, out=work.spare)
            on = np.equal(residue, _PER_OCTAVE - 1, out=work.flag).nonzero()[0]
            n >>= _LEVEL_BITS
            cost = ((n[on] << 52) + unit[on].view(np.int64)).view(np.float64)
            order = cost.argsort(kind="stable")  # on is ascending: ties keep tone order
            if room is None:  # the cut moved: what is left, from the tones themselves
                room = budget - float(np.dot(unit, energy.take(n)))
            if target is None:
                take = int(np.add.accumulate(cost[order]).searchsorted(room, side="right"))
            else:
                take = room
            n[on[order[:take]]] += 1
            need = np.multiply(unit, energy.take(n), out=work.need)
            spent = float(np.add.reduce(need))
            while target is None and spent > budget and take:  # the table's rounding
                take -= 1
                i = on[order[take]]
                n[i] -= 1
                need[i] = unit[i] * energy[n[i]]
                spent = float(need.sum())
            if target is None and spent > budget and cut > 0:
                cut, room = cut - 1, None
                continue
            return n, need, spent

    # ---------------------------------------------------------------- searches

    def _bracket(self, tones: _Tones, measure, limit: float, guess: float, newton=None):
        """Narrow the threshold until no tone has two steps inside ``(lo, hi]``.

        ``measure(n)`` is nondecreasing in the steps ``n``. Returns ``(n_lo, n_hi, m_lo)`` with
        ``m_lo = measure(n_lo) <= limit < measure(n_hi)``, or ``(top, None, measure(top))`` when
        everything fits. The search starts at ``guess`` and widens by doubling until it holds
        the limit, bisects until the bracket is narrower than the key spacing, then takes one
        interpolated probe (unless the bracket is already narrow) so that the final sort sees
        few tones. ``newton(m)``, when given, estimates how far the threshold must move from
        where ``measure`` gave ``m``: the first step of the walk is that distance plus a little,
        so a good guess brackets the limit in two evaluations. The guess, the first step and
        the probe only save work: any bracket with the invariant gives the same exact answer.
        """
        top = tones.top_f if self._unit_steps else tones.top
        live = tones.top > 0
        if not live.any():
            return top, None, 0.0
        spacing = self._key_spacing
        t = guess
        n = self._steps_at(tones, t)
        m = measure(n)
        step = 0.5 * spacing
        if newton is not None:
            estimate = abs(newton(m))
            if math.isfinite(estimate):
                step = min(estimate + _OVERSHOOT * spacing, step)
        if m <= limit:  # walk up until over the limit (or everything fits)
            lo, n_lo, m_lo = t, n, m
            # the threshold past which every tone is full
            key_top = tones.log_unit + (tones.top_f - 1.0 if self._unit_steps
                                        else self._step_key[tones.top - 1])
            t_max = float(key_top.max() if live.all() else key_top[live].max())
            while True:
                t = lo + step
                if t >= t_max:
                    m = measure(top)
                    if m <= limit:
                        return top, None, m
                    hi, n_hi, m_hi = t_max, top, m
                    break
                n = self._steps_at(tones, t)
                m = measure(n)
                if m > limit:
                    hi, n_hi, m_hi = t, n, m
                    break
                lo, n_lo, m_lo = t, n, m
                step *= 2.0
        else:  # walk down until within the limit (nothing loaded always is)
            hi, n_hi, m_hi = t, n, m
            # the threshold below which no tone takes a step
            t_min = float(tones.log_unit.min()) + float(self._step_key[0]) - 1.0
            while True:
                t = hi - step
                if t <= t_min:
                    lo, n_lo, m_lo = t_min, np.zeros_like(top), 0.0
                    break
                n = self._steps_at(tones, t)
                m = measure(n)
                if m <= limit:
                    lo, n_lo, m_lo = t, n, m
                    break
                hi, n_hi, m_hi = t, n, m
                step *= 2.0
        while hi - lo >= spacing:
            mid = 0.5 * (lo + hi)
            n = self._steps_at(tones, mid)
            m = measure(n)
            if m <= limit:
                lo, n_lo, m_lo = mid, n, m
            else:
                hi, n_hi, m_hi = mid, n, m
        width = hi - lo
        if width <= _NARROW * spacing:  # few tones have a step inside: no probe needed
            return n_lo, n_hi, m_lo
        t = lo + width * (limit - m_lo) / (m_hi - m_lo)
        t = min(max(t, lo + 0.02 * width), hi - 0.02 * width)
        n = self._steps_at(tones, t)
        m = measure(n)
        if m <= limit:
            n_lo, m_lo = n, m
        else:
            n_hi = n
        return n_lo, n_hi, m_lo

    def _candidates(self, tones: _Tones, n_lo: np.ndarray, n_hi: np.ndarray):
        """Tones with a step inside the bracket and that step's index, in efficiency order."""
        idx = np.flatnonzero(n_hi > n_lo)
        j = n_lo[idx].astype(np.int64)
        key = tones.log_unit[idx] + self._step_key[j]
        order = np.argsort(key)
        return idx[order], j[order]

    def _rate_steps(self, tones: _Tones, budget: float) -> np.ndarray:
        """Steps per tone of the rate-maximising allocation (see the class notes)."""
        if not tones.top.any():  # nothing can load (no tones, or none affordable)
            return np.zeros(tones.top.size, dtype=np.int64)
        live = int(np.count_nonzero(tones.top))
        # At threshold t a tone's energy is below twice its last step, so about
        # 1.44 * 2**t on average (mean of 2**(1 - u), u uniform): a first guess only.
        guess = math.log2((budget + tones.unit_sum) / (1.4427 * live * self._max_step))
        # The energy of the unsaturated tones doubles per unit of threshold: a Newton step
        # in log2 (exact for a pure power of two, short when tones saturate on the way).
        n_lo, n_hi, spent = self._bracket(
            tones, lambda n: self._energy_of(tones, n), budget, guess,
            newton=lambda m: math.log2(budget / m) if m > 0.0 else math.inf)
        if n_hi is not None:
            idx, j = self._candidates(tones, n_lo, n_hi)
            cost = tones.unit[idx] * self._step_energy[j]
            room = budget - spent
            take = int(np.searchsorted(np.cumsum(cost), room, side="right"))
            n_lo = n_lo.copy()
            n_lo[idx[:take]] += 1
        return n_lo.astype(np.int64)

    def _margin_steps(self, tones: _Tones, target: int) -> np.ndarray:
        """Steps per tone of the least-power allocation with exactly ``target`` bits.

        The caller has checked that the ceilings allow ``target`` bits.
        """
        live = tones.top > 0
        n_live = max(int(np.count_nonzero(live)), 1)
        # A tone takes about t - log2(unit) + 1 unit steps at threshold t: a first guess only.
        guess = (target / self._mean_step + float(tones.log_unit[live].sum())) / n_live \
            - 1.0 if live.any() else 0.0
        n_lo, n_hi, count = self._bracket(tones, self._bits_of, target, guess)
        if n_hi is None:
            return n_lo.astype(np.int64)
        idx, j = self._candidates(tones, n_lo, n_hi)
        size = self._step_bits[j]
        rest = target - count
        take = int(np.searchsorted(np.cumsum(size), rest, side="right"))
        n = n_lo.astype(np.int64)
        n[idx[:take]] += 1
        rest -= int(size[:take].sum())
        if rest:
            n = self._fill_remainder(tones, n, rest, target)
        return n

    def _fill_remainder(self, tones: _Tones, n: np.ndarray, rest: int,
                        target: int) -> np.ndarray:
        """Add exactly ``rest`` bits (less than one step) at the least extra power found.

        Options: one step of exactly ``rest`` bits on some tone, or a step of ``s`` bits up on
        one tone and a step of ``s - rest`` bits down on another. Sets with holes only.
        """
        unit, top = tones.unit, tones.top
        up_ok = n < top
        j_up = np.minimum(n, self._step_bits.size - 1)
        up_size = np.where(up_ok, self._step_bits[j_up], 0)
        up_cost = np.where(up_ok, unit * self._step_energy[j_up], np.inf)
        down_ok = n > 0
        j_dn = np.maximum(n - 1, 0)
        dn_size = np.where(down_ok, self._step_bits[j_dn], 0)
        dn_save = np.where(down_ok, unit * self._step_energy[j_dn], -np.inf)
        best_cost, best = math.inf, None
        single = np.flatnonzero(up_size == rest)
        if single.size:
            i = int(single[np.argmin(up_cost[single])])
            best_cost, best = float(up_cost[i]), (i, None)
        for s in np.unique(up_size[up_size > rest]):
            ups = np.flatnonzero(up_size == s)
            dns = np.flatnonzero(dn_size == s - rest)
            if not dns.size:
                continue
            i = ups[np.argsort(up_cost[ups], kind="stable")[:2]]
            k = dns[np.argsort(-dn_save[dns], kind="stable")[:2]]
            for a in i:
                for b in k:
                    if a != b and up_cost[a] - dn_save[b] < best_cost:
                        best_cost, best = float(up_cost[a] - dn_save[b]), (int(a), int(b))
        if best is None:
            raise InfeasibleError(f"target_bits={target} cannot be reached "
                                  f"exactly with bits={self.bits.tolist()} on these tones "
                                  f"(short by {rest})")
        n = n.copy()
        n[best[0]] += 1
        if best[1] is not None:
            n[best[1]] -= 1
        return n

    # ---------------------------------------------------------------- calls

    def __call__(self, snr) -> Allocation:
        """Load one frame.

        Parameters
        ----------
        snr : array_like of float
            Linear per-tone SNR at nominal power, (N,), finite and >= 0.

        Returns
        -------
        Allocation
            Bits and powers per tone in this loader's mode.

        Raises
        ------
        InputError
            A NaN, infinite or negative SNR, or an array that is not 1-D.
        InfeasibleError
            Margin mode only: ``target_bits`` does not fit the budget and ceilings.

        Examples
        --------
        >>> loader = Loader(bits=range(11), gap_db=9.8)
        >>> alloc = loader(np.array([1000.0, 100.0, 10.0, 0.0]))
        >>> alloc.bits.tolist(), round(alloc.margin_db, 2)
        ([7, 4, 1, 0], 0.46)
        """
        if self.mode == "rate":
            return self._rate(*_checked_snr(snr))
        if self.mode == "margin":
            return self._margin_mode(*_checked_snr(snr), self.target_bits)
        return self.quantized_waterfill(snr)

    def rate(self, snr) -> Allocation:
        """Rate mode for ``snr``, whatever ``mode`` this loader was built with."""
        return self._rate(*_checked_snr(snr))

    def _rate(self, snr: np.ndarray, snr_min: float, snr_max: float) -> Allocation:
        budget = self._budget(snr.size)
        ladder = self._ladder(snr, snr_min, snr_max, budget) if self._unit_steps else None
        if ladder is not None:
            n, need, spent = self._climb(ladder, budget)
            return self._allocation(n, need, budget, scale=False, total=spent)
        tones = self._tones(snr, budget)
        n = self._rate_steps(tones, budget)
        return self._allocation(self.bits[n], tones.unit * self._energy[n], budget, scale=False)

    def margin(self, snr, target_bits: int) -> Allocation:
        """Margin mode for ``snr`` and ``target_bits``.

        Raises
        ------
        InfeasibleError
            When ``target_bits`` exceeds the most bits the budget and ceilings allow; the
            message gives both numbers.
        """
        return self._margin_mode(*_checked_snr(snr), target_bits)

    def _margin_mode(self, snr: np.ndarray, snr_min: float, snr_max: float,
                     target_bits: int) -> Allocation:
        target = check_target_bits(target_bits, error=InputError)
        budget = self._budget(snr.size)
        ladder = self._ladder(snr, snr_min, snr_max, budget) if self._unit_steps else None
        if ladder is not None:
            ladder = self._with_tops(ladder)
            if target > int(ladder.top.sum()):
                self._raise_infeasible(target, self._climb(ladder, budget)[0], budget)
            bits, need, _ = self._climb(ladder, budget, target)
        else:
            tones = self._tones(snr, budget)
            if target > int(self.bits[tones.top].sum()):
                self._raise_infeasible(target, self._rate_steps(tones, budget), budget)
            n = self._margin_steps(tones, target)
            bits, need = self.bits[n], tones.unit * self._energy[n]
        # The rate search sums energies in another order; allow for that rounding so that the
        # rate-mode maximum is always a feasible target.
        if float(need.sum()) > budget * (1.0 + 1e-12):
            best = (self._climb(ladder, budget)[0] if ladder is not None
                    else self._rate_steps(tones, budget))
            self._raise_infeasible(target, best, budget)
        return self._allocation(bits, need, budget, scale=True)

    def _raise_infeasible(self, target: int, rate_steps: np.ndarray, budget: float):
        """Refuse ``target``, given the steps per tone of the rate-mode allocation."""
        best = int(self.bits[rate_steps].sum())
        if best >= target:  # only with holes in the bit set: see the class notes
            raise InfeasibleError(f"target_bits={target} with bits={self.bits.tolist()} does "
                                  f"not fit the budget (budget_db={self.budget_db:g}) in the "
                                  f"near-minimal allocation; rate mode reaches {best} bits")
        raise InfeasibleError(f"target_bits={target} is more than the {best} bits the budget "
                              f"(budget_db={self.budget_db:g}) and ceilings "
                              f"(cap_db={self.cap_db:g}) allow")

    def quantized_waterfill(self, snr) -> Allocation:
        """Water-filled powers with each tone's bits rounded down to the allowed set."""
        snr = _as_snr(snr)
        wf = waterfill(snr, gap_db=self.gap_db, budget_db=self.budget_db, cap_db=self.cap_db)
        with np.errstate(divide="ignore", invalid="ignore"):
            room = np.where(snr > 0, wf.power * snr / self._gap, 0.0)
        j = np.searchsorted(self._energy, room * (1.0 + 1e-12), side="right") - 1
        bits = self.bits[np.maximum(j, 0)]
        power = np.where(bits > 0, wf.power, 0.0)
        need = self.required_power(bits, snr)
        return Allocation(bits=bits, power=power, total_bits=int(bits.sum()),
                          total_power=float(power.sum()),
                          margin_db=self._margin(need, self._budget(snr.size)))

    def _allocation(self, bits: np.ndarray, need: np.ndarray, budget: float, *,
                    scale: bool, total: float | None = None) -> Allocation:
        """The record; ``total`` is ``need.sum()`` when the caller has it."""
        margin_db = uniform_margin_db(need, budget, self._cap, total=total)
        if scale and math.isfinite(margin_db):
            power = need * 10.0 ** (margin_db / 10.0)
            total = float(power.sum())
        else:
            power = need
            total = float(need.sum()) if total is None else total
        return Allocation(bits=bits, power=power, total_bits=int(np.add.reduce(bits)),
                          total_power=total, margin_db=margin_db)


def load_rate(snr, *, bits: Iterable[int] = range(9), gap_db: float, budget_db: float = 0.0,
              cap_db: float = math.inf) -> Allocation:
    """The most bits within the power budget and per-tone ceilings.

    Parameters
    ----------
    snr : array_like of float
        Linear per-tone SNR at nominal power, (N,).
    bits : iterable of int
        Allowed bits per tone, ascending from 0 (holes allowed).
    gap_db, budget_db, cap_db : float
        SNR gap (margin and coding gain included), total budget and per-tone ceiling, dB.

    Returns
    -------
    Allocation
        Loaded tones carry exactly their required power; ``margin_db`` is the headroom.

    Notes
    -----
    Levin-Campello loading (Campello, ICC 1999), exactly optimal for consecutive bit sets and
    within ``max_step - 1`` bits of optimal for sets with holes; see :class:`Loader`.
    """
    return _loader("rate", bits, gap_db, budget_db, cap_db, None)(snr)


def load_margin(snr, *, target_bits: int, bits: Iterable[int] = range(9), gap_db: float,
                budget_db: float = 0.0, cap_db: float = math.inf) -> Allocation:
    """Exactly ``target_bits`` with the least power, then the largest uniform margin.

    Parameters
    ----------
    snr : array_like of float
        Linear per-tone SNR at nominal power, (N,).
    target_bits : int
        Bits per OFDM symbol.
    bits : iterable of int
        Allowed bits per tone, ascending from 0 (holes allowed).
    gap_db, budget_db, cap_db : float
        SNR gap (margin and coding gain included), total budget and per-tone ceiling, dB.

    Returns
    -------
    Allocation
        Every loaded tone's power is its required power times ``10**(margin_db/10)``, the
        largest factor the budget and the ceilings allow.

    Raises
    ------
    InfeasibleError
        ``target_bits`` is more than the budget and ceilings allow; the message gives the target
        and the maximum achievable bits.
    """
    return _loader("margin", bits, gap_db, budget_db, cap_db, target_bits)(snr)


def _loader(mode: str, bits, gap_db, budget_db, cap_db, target_bits) -> Loader:
    """A :class:`Loader` for the free functions, reused while the settings repeat.

    Building one validates the settings and looks up the bit tables, which costs as much as a
    quarter of a 4096-tone frame; a loader's only state is per-thread work arrays, so sharing
    is safe. Only plain ``int`` bits (a ``range`` holds nothing else) and plain numbers are
    cached (``True == 1`` must not hit a cache entry that skipped the check refusing booleans).
    """
    if type(bits) is range:
        key = bits
    else:
        try:
            key = tuple(bits)
        except TypeError:
            key = None
        if key is not None and not all(type(b) is int for b in key):
            key = None
    if key is None or type(gap_db) not in _PLAIN or type(budget_db) not in _PLAIN \
            or type(cap_db) not in _PLAIN or not (target_bits is None or type(target_bits) is int):
        return Loader(mode=mode, bits=bits, gap_db=gap_db, budget_db=budget_db, cap_db=cap_db,
                      target_bits=target_bits)
    return _cached_loader(mode, key, gap_db, budget_db, cap_db, target_bits)


_PLAIN = (int, float)


@functools.lru_cache(maxsize=32)
def _cached_loader(mode, bits, gap_db, budget_db, cap_db, target_bits) -> Loader:
    return Loader(mode=mode, bits=bits, gap_db=gap_db, budget_db=budget_db, cap_db=cap_db,
                  target_bits=target_bits)


def _greedy_oracle(snr, *, bits_max: int, gap_db: float, budget_db: float = 0.0,
                   cap_db: float = math.inf) -> np.ndarray:
    """Hughes-Hartogs greedy loading (bits 0..bits_max): one bit at a time to the cheapest tone.

    The textbook reference (Hughes-Hartogs, 1987 patent; Cioffi's DMT notes ch. 4): slow
    (one pass over the tones per bit) and exactly optimal for consecutive bit sets. Kept for
    tests and benchmarks only.
    """
    snr = _as_snr(snr)
    gap = 10.0 ** (gap_db / 10.0)
    cap = 10.0 ** (cap_db / 10.0)
    budget = snr.size * 10.0 ** (budget_db / 10.0)
    b = np.zeros(snr.size, dtype=np.int64)
    with np.errstate(divide="ignore"):
        unit = np.where(snr > 0, gap / snr, np.inf)
    incr = unit.copy()  # power to add the next bit: unit * 2**b
    spent = 0.0
    while True:
        # A tone that is full or whose next bit breaks its ceiling is out of the race.
        i = int(np.argmin(incr))
        cost = incr[i]
        if not math.isfinite(cost) or spent + cost > budget:
            break
        if unit[i] * (2.0 ** (b[i] + 1) - 1.0) > cap:
            incr[i] = np.inf
            continue
        spent += cost
        b[i] += 1
        incr[i] = np.inf if b[i] >= bits_max else unit[i] * 2.0 ** b[i]
    return b
