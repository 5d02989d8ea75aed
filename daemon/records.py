"""Typed, frozen records for everything that crosses a boundary.

Every array field is converted to its documented dtype and made read-only when the record is
built, so a record can be shared between the estimator, change control, the publisher and a
recording without copies or surprises. Records check their *structure* (shapes, dtypes, ranges
that make the record meaningless); judging *content* (a NaN SNR, a non-positive noise variance)
is the estimator's job, which drops and counts such frames.

Units are in the names: ``_s`` seconds, ``_hz`` hertz, ``_db`` decibels, ``_lin`` linear power
ratio. Tone indices are signed FFT bins (``-N/2 .. N/2-1``; 0 is DC).
"""

from __future__ import annotations

import enum
import hashlib
import math
from dataclasses import dataclass, field

import numpy as np

__all__ = [
    "TonePlan",
    "Estimate",
    "Allocation",
    "LoadMap",
    "DecisionKind",
    "Decision",
    "Tracked",
    "FrameOutcome",
    "frozen_array",
    "MAX_FFT_SIZE",
]


#: Largest FFT a tone plan may have: twice the 32K mode of DVB-T2 (ETSI EN 302 755), the
#: largest in broadcast OFDM. It also bounds what a decoded plan from the wire can allocate.
MAX_FFT_SIZE = 1 << 16


def frozen_array(values, dtype, name: str, ndim: int = 1) -> np.ndarray:
    """Return ``values`` as a read-only array of ``dtype`` with ``ndim`` dimensions.

    Parameters
    ----------
    values : array_like
        The data. Copied, unless it is already a read-only array of ``dtype`` with ``ndim``
        dimensions that owns its memory: another record's array, or a fresh array its maker
        set read-only before making any view of it (the per-frame path hands its results on
        this way instead of paying for a copy per field and frame).
    dtype : numpy dtype
        The dtype the record documents for this field.
    name : str
        The field name, used in the error message.
    ndim : int
        Required number of dimensions.

    Raises
    ------
    ValueError
        When the shape has the wrong number of dimensions.
    """
    if (type(values) is np.ndarray and not values.flags.writeable and values.base is None
            and values.dtype == dtype and values.ndim == ndim):
        return values
    arr = np.array(values, dtype=dtype, copy=True)
    if arr.ndim != ndim:
        raise ValueError(f"{name} must be {ndim}-D, got shape {arr.shape}")
    arr.setflags(write=False)
    return arr


_set = object.__setattr__  # sets a field of a frozen record in __post_init__


@dataclass(frozen=True)
class TonePlan:
    """Where each tone of an OFDM symbol goes.

    Attributes
    ----------
    fft_size : int
        FFT length in samples.
    cp_len : int
        Cyclic prefix length in samples.
    sample_rate_hz : float
        Complex sample rate in hertz.
    data_tones, pilot_tones, null_tones : ndarray of int16
        Signed FFT bins. Data and pilot tones are disjoint; every bin not listed as data or pilot
        is a null (guard band or DC), and ``null_tones`` holds exactly those bins.
    """

    fft_size: int
    cp_len: int
    sample_rate_hz: float
    data_tones: np.ndarray
    pilot_tones: np.ndarray
    null_tones: np.ndarray = field(default=None)  # derived when not given

    def __post_init__(self) -> None:
        n = int(self.fft_size)
        if n < 8 or n & (n - 1) or n > MAX_FFT_SIZE:
            raise ValueError(f"fft_size={self.fft_size} must be a power of two in "
                             f"[8, {MAX_FFT_SIZE}]")
        if not 0 <= int(self.cp_len) < n:
            raise ValueError(f"cp_len={self.cp_len} must be in [0, fft_size)")
        if not (math.isfinite(self.sample_rate_hz) and self.sample_rate_hz > 0):
            raise ValueError(f"sample_rate_hz={self.sample_rate_hz} must be positive")
        _set(self, "fft_size", n)
        _set(self, "cp_len", int(self.cp_len))
        _set(self, "sample_rate_hz", float(self.sample_rate_hz))
        data = frozen_array(np.sort(np.asarray(self.data_tones)), np.int16, "data_tones")
        pilot = frozen_array(np.sort(np.asarray(self.pilot_tones)), np.int16, "pilot_tones")
        for name, arr in (("data_tones", data), ("pilot_tones", pilot)):
            if arr.size and (arr.min() < -n // 2 or arr.max() >= n // 2):
                raise ValueError(f"{name} must lie in [{-n // 2}, {n // 2 - 1}]")
            if np.unique(arr).size != arr.size:
                raise ValueError(f"{name} has repeated bins")
        if data.size == 0:
            raise ValueError("data_tones is empty")
        both = np.intersect1d(data, pilot)
        if both.size:
            raise ValueError(f"bins {both.tolist()} are both data and pilot tones")
        used = np.union1d(data, pilot)
        nulls = np.setdiff1d(np.arange(-n // 2, n // 2), used)
        _set(self, "data_tones", data)
        _set(self, "pilot_tones", pilot)
        _set(self, "null_tones", frozen_array(nulls, np.int16, "null_tones"))

    @property
    def tone_spacing_hz(self) -> float:
        """Subcarrier spacing in hertz."""
        return self.sample_rate_hz / self.fft_size

    @property
    def symbol_len(self) -> int:
        """Samples per OFDM symbol including the cyclic prefix."""
        return self.fft_size + self.cp_len

    @property
    def plan_id(self) -> str:
        """Short stable id (12 hex digits) carried by every estimate and map of this plan."""
        h = hashlib.sha256()
        h.update(f"{self.fft_size}:{self.cp_len}:{self.sample_rate_hz!r}:".encode())
        h.update(self.data_tones.astype("<i2").tobytes())
        h.update(b"|")
        h.update(self.pilot_tones.astype("<i2").tobytes())
        return h.hexdigest()[:12]


_ESTIMATE_ARRAYS = (("channel", np.complex64), ("noise_var", np.float32), ("snr_db", np.float32))


@dataclass(frozen=True)
class Estimate:
    """One frame's pilot-based channel estimate, for the data tones of a tone plan.

    Attributes
    ----------
    frame : int
        Frame number as counted by the source (monotonic per source).
    time_s : float
        Time of the frame in seconds (source clock; replay keeps the recorded times).
    plan_id : str
        ``TonePlan.plan_id`` of the plan the frame was received with.
    tone_index : ndarray of int16
        Signed FFT bins, equal to the plan's ``data_tones``.
    channel : ndarray of complex64
        Channel estimate per tone (linear, complex).
    noise_var : ndarray of float32
        Noise variance per tone, same scale as ``abs(channel)**2``.
    snr_db : ndarray of float32
        Per-tone SNR at nominal (unit) transmit power, in dB.
    map_seq_seen : int
        Map sequence number read from the frame header (-1 when none or the header failed).
    sync_metric : float
        Timing metric at the detected frame start (0..1).
    cfo_hz : float
        Estimated carrier frequency offset in hertz.
    header_ok : bool
        Whether the header passed its CRC.
    valid : bool
        Whether the source considers the estimate usable.
    center_hz : float
        Radio tuning (centre frequency) in hertz, NaN when unknown; a change resets tracking.
    """

    frame: int
    time_s: float
    plan_id: str
    tone_index: np.ndarray
    channel: np.ndarray
    noise_var: np.ndarray
    snr_db: np.ndarray
    map_seq_seen: int = -1
    sync_metric: float = 1.0
    cfo_hz: float = 0.0
    header_ok: bool = True
    valid: bool = True
    center_hz: float = math.nan

    def __post_init__(self) -> None:
        # Fields are converted in the instance dict: the frozen record's attributes are set
        # once here, before anyone sees it (one dict store each instead of a setattr call;
        # the per-frame path builds one of these per estimate).
        d = self.__dict__
        d["frame"] = int(d["frame"])
        d["time_s"] = float(d["time_s"])
        d["map_seq_seen"] = int(d["map_seq_seen"])
        d["sync_metric"] = float(d["sync_metric"])
        d["cfo_hz"] = float(d["cfo_hz"])
        d["center_hz"] = float(d["center_hz"])
        d["header_ok"] = bool(d["header_ok"])
        d["valid"] = bool(d["valid"])
        tones = d["tone_index"] = frozen_array(d["tone_index"], np.int16, "tone_index")
        for name, dtype in _ESTIMATE_ARRAYS:
            arr = frozen_array(d[name], dtype, name)
            if arr.shape != tones.shape:
                raise ValueError(f"{name} has {arr.size} tones, tone_index has {tones.size}")
            d[name] = arr

    @property
    def n_tones(self) -> int:
        """Number of tones in the estimate."""
        return int(self.tone_index.size)


@dataclass(frozen=True)
class Allocation:
    """Result of a loading computation over N tones.

    Attributes
    ----------
    bits : ndarray of int64
        Bits per tone.
    power : ndarray of float64
        Power per tone, linear, relative to the nominal per-tone power (0 where bits are 0).
    total_bits : int
        Sum of ``bits``.
    total_power : float
        Sum of ``power`` (linear, in units of the nominal per-tone power).
    margin_db : float
        Largest uniform factor in dB by which every loaded tone's required power could grow
        and still fit the budget and ceilings (``inf`` when nothing is loaded).
    """

    bits: np.ndarray
    power: np.ndarray
    total_bits: int
    total_power: float
    margin_db: float

    def __post_init__(self) -> None:
        _set(self, "bits", frozen_array(self.bits, np.int64, "bits"))
        _set(self, "power", frozen_array(self.power, np.float64, "power"))
        if self.bits.shape != self.power.shape:
            raise ValueError("bits and power differ in length")
        _set(self, "total_bits", int(self.total_bits))
        _set(self, "total_power", float(self.total_power))
        _set(self, "margin_db", float(self.margin_db))


@dataclass(frozen=True)
class LoadMap:
    """A bit/power map as published to the transmitter.

    Attributes
    ----------
    epoch : str
        Daemon epoch id (stable across restarts that continue the saved state).
    seq : int
        Map sequence number, strictly increasing, never reused.
    effective_frame : int
        Frame number from which the transmitter applies the map.
    created_s : float
        Creation time in seconds (daemon clock).
    plan_id : str
        Tone plan the map is for.
    tone_index : ndarray of int16
        Signed FFT bins (the plan's data tones).
    bits : ndarray of uint8
        Bits per tone.
    power_lin : ndarray of float32
        Power per tone, linear, relative to nominal (0 where bits are 0).
    total_bits : int
        Bits per OFDM symbol.
    margin_db : float
        Uniform margin of the map in dB.
    gap_db : float
        SNR gap used, in dB (coding gain and target margin included).
    reason : str
        Why this map was made (shown to operators).
    fallback : bool
        True for the configured safe map sent when estimates are stale.
    """

    epoch: str
    seq: int
    effective_frame: int
    created_s: float
    plan_id: str
    tone_index: np.ndarray
    bits: np.ndarray
    power_lin: np.ndarray
    total_bits: int
    margin_db: float
    gap_db: float
    reason: str = ""
    fallback: bool = False

    def __post_init__(self) -> None:
        _set(self, "seq", int(self.seq))
        _set(self, "effective_frame", int(self.effective_frame))
        _set(self, "created_s", float(self.created_s))
        _set(self, "total_bits", int(self.total_bits))
        _set(self, "margin_db", float(self.margin_db))
        _set(self, "gap_db", float(self.gap_db))
        _set(self, "fallback", bool(self.fallback))
        tones = frozen_array(self.tone_index, np.int16, "tone_index")
        _set(self, "tone_index", tones)
        _set(self, "bits", frozen_array(self.bits, np.uint8, "bits"))
        _set(self, "power_lin", frozen_array(self.power_lin, np.float32, "power_lin"))
        for name in ("bits", "power_lin"):
            if getattr(self, name).shape != tones.shape:
                raise ValueError(f"{name} has {getattr(self, name).size} tones, "
                                 f"tone_index has {tones.size}")
        if self.seq < 0:
            raise ValueError(f"seq={self.seq} must be >= 0")


class DecisionKind(str, enum.Enum):
    """What change control decided for one update."""

    KEEP = "keep"
    BIT_SWAP = "bit_swap"
    RELOAD = "reload"
    EMERGENCY = "emergency"
    FALLBACK = "fallback"


@dataclass(frozen=True)
class Decision:
    """One change-control decision.

    Attributes
    ----------
    kind : DecisionKind
        Keep the current map, or which kind of change.
    reason : str
        Human-readable reason for the status stream (always set, also for ``keep``).
    allocation : Allocation or None
        The new bits and powers; None for ``keep``.
    tones_changed : int
        Tones whose bits or power differ from the current map (0 for ``keep``).
    cause : str
        The rule that made this decision, one short key for machines (the ``reason`` says it in
        words): ``first_map``, ``after_fallback``, ``plan_changed``, ``emergency_tones``,
        ``emergency_drop``, ``common_mode``, ``sag``, ``outer_offset``, ``upgrade``,
        ``repair_and_upgrade`` and ``tones_low`` (a bit swap); for a reload that repairs tones
        below the downshift margin, the limit that ruled out a bit swap: ``swap_tones`` (more
        tones to change than ``swap_max_tones``), ``swap_loss`` (more bits lost than
        ``swap_max_loss_bits``), ``swap_power`` (the repair does not fit the power budget or
        ceiling) or ``swap_off`` (bit swaps impossible with this loader or setting); the
        kind's name for a forced map; for ``keep`` the counter it was counted under
        (``keep``, ``held_persist``, ``held_dwell``, ``held_rate``, ``bad_input``). Empty when
        not given.
    """

    kind: DecisionKind
    reason: str
    allocation: Allocation | None = None
    tones_changed: int = 0
    cause: str = ""

    def __post_init__(self) -> None:
        if type(self.kind) is not DecisionKind:
            _set(self, "kind", DecisionKind(self.kind))
        if (self.allocation is None) != (self.kind is DecisionKind.KEEP):
            raise ValueError("a decision carries an allocation exactly when it is not 'keep'")


@dataclass(frozen=True)
class Tracked:
    """The estimator's current view of the channel, per data tone (estimator -> change control).

    Attributes
    ----------
    plan_id : str
        Tone plan the tracking belongs to.
    tone_index : ndarray of int16
        Signed FFT bins (the plan's data tones).
    snr_db : ndarray of float64
        Smoothed per-tone SNR at nominal power, dB.
    std_db : ndarray of float64
        Per-tone standard deviation of a single frame's SNR about the smoothed value, dB
        (estimation noise plus fast channel variation).
    effective_snr_db : ndarray of float64
        ``snr_db`` backed off by the configured number of ``hypot(std_db, mean_std_db)``; what
        loading uses, dB.
    age_s : float
        Time since the last accepted frame, seconds (``now_s`` of the caller's clock).
    frames : int
        Frames accepted since tracking last started (first frame, reset, plan or tuning change).
    mean_std_db : ndarray of float64 or None
        Standard deviation of ``snr_db`` itself (uncertainty of the tracked value), dB; None
        fills zeros.
    center_hz : float
        Radio tuning of the tracked frames in hertz (NaN when unknown).
    time_s : float
        Source time of the last accepted frame, seconds.
    predicted_s : float
        How far ahead of ``time_s`` ``effective_snr_db`` already looks (the channel
        prediction's horizon, each tone at its predicted worst), seconds; 0 when it is the
        present view. Change control does not extrapolate such a view again.
    """

    plan_id: str
    tone_index: np.ndarray
    snr_db: np.ndarray
    std_db: np.ndarray
    effective_snr_db: np.ndarray
    age_s: float
    frames: int
    mean_std_db: np.ndarray = None
    center_hz: float = math.nan
    time_s: float = math.nan
    predicted_s: float = 0.0

    def __post_init__(self) -> None:
        d = self.__dict__   # set once, before anyone sees the record (as in Estimate)
        tones = d["tone_index"] = frozen_array(d["tone_index"], np.int16, "tone_index")
        if d["mean_std_db"] is None:
            d["mean_std_db"] = np.zeros(tones.size)
        for name in ("snr_db", "std_db", "effective_snr_db", "mean_std_db"):
            arr = frozen_array(d[name], np.float64, name)
            if arr.shape != tones.shape:
                raise ValueError(f"{name} has {arr.size} tones, tone_index has {tones.size}")
            d[name] = arr
        d["age_s"] = float(d["age_s"])
        d["frames"] = int(d["frames"])
        d["center_hz"] = float(d["center_hz"])
        d["time_s"] = float(d["time_s"])

    @property
    def n_tones(self) -> int:
        """Number of tones tracked."""
        return int(self.tone_index.size)


@dataclass(frozen=True)
class FrameOutcome:
    """Whether one data frame arrived intact, as the receiver side reports it (receiver ->
    daemon, topic ``outcome``); the outer margin loop's input.

    Attributes
    ----------
    epoch : str
        Epoch of the map the frame was sent with (the daemon ignores other epochs).
    seq : int
        Sequence number of that map (>= 0).
    frame : int
        The frame's counter from its header (>= 0).
    errored : bool
        True when the frame failed its payload check (a frame error), False when it was good.
    time_s : float
        Receiver's time of the frame, seconds (finite).
    """

    epoch: str
    seq: int
    frame: int
    errored: bool
    time_s: float

    def __post_init__(self) -> None:
        for name in ("seq", "frame"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
                raise ValueError(f"{name}={value!r} must be an integer")
            if value < 0:
                raise ValueError(f"{name}={value} must be >= 0")
            _set(self, name, int(value))
        if not isinstance(self.errored, (bool, np.bool_)):
            raise ValueError(f"errored={self.errored!r} must be true or false")
        _set(self, "errored", bool(self.errored))
        _set(self, "time_s", float(self.time_s))
        if not math.isfinite(self.time_s):
            raise ValueError(f"time_s={self.time_s} must be finite")
        _set(self, "epoch", str(self.epoch))
