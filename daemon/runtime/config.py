"""Daemon configuration: YAML in, frozen validated section objects out.

Validation uses pydantic (strict types, unknown keys rejected) and every error becomes one
:class:`~brimline.daemon.errors.ConfigError` line that names the file, the line, the key path
and the offending value, e.g.::

    config/demo.yaml line 12: loading.gap_db='9.8': Input should be a valid number

Each section is a frozen model; the code that owns a section's meaning documents its keys in the
model's field descriptions. Cross-section checks live in ``Config``'s validators.

One home per rule: a section whose keys are a constructor's keyword arguments does not write its
own checks. It validates each key with the owner's limit table (``ESTIMATOR_LIMITS``,
``CHANGE_LIMITS``, ``PUBLISH_LIMITS``, ``STATUS_LIMITS``, ``REPLAY_LIMITS``; see
:mod:`brimline.daemon.limits`) and the owner's rules between keys (``check_change_settings``,
``check_publish_settings``, ``check_interferer_window``, ``check_link``), which the constructor
applies too. The estimator and change sections take their defaults from the constructors'
signatures; the tests hold the other sections' defaults equal to their constructors'. The loading
section checks ``bits`` with ``loading.allowed_bits``, the one allowed-bits rule. A new key goes
into the constructor (default and limit) first, then into the section with its description.

YAML is read with :class:`ConfigLoader`, which adds YAML 1.2's float rule so that ``1e6`` is a
number.

The YAML is read with :class:`GuardedLoader` (a :class:`ConfigLoader`): alias expansion,
nesting depth and file size are bounded and a key written twice in a mapping is refused, each with its line, so a hostile or
mistyped file costs milliseconds and a few kB, never gigabytes.
"""

from __future__ import annotations

import inspect
import math
import os
import re
from pathlib import Path
from typing import Any, Literal, Optional

import yaml
from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from brimline.daemon.core.change import CHANGE_LIMITS, ChangeControl, check_change_settings
from brimline.daemon.core.estimator import ESTIMATOR_LIMITS, Estimator
from brimline.daemon.core.loading import Loader, allowed_bits, check_target_bits
from brimline.daemon.core.outer import OUTER_LIMITS, OuterLoop, check_outer_settings
from brimline.daemon.core.qam import TARGET_SER, qam_gap_db
from brimline.daemon.errors import ConfigError
from brimline.daemon.limits import (
    FINITE,
    NON_NEGATIVE,
    POSITIVE,
    Limit,
    at_least,
    between,
    check_db,
)
from brimline.daemon.net.metrics import METRICS_LIMITS, MetricsEndpoint
from brimline.daemon.net.publisher import PUBLISH_LIMITS, STATUS_LIMITS, check_publish_settings
from brimline.daemon.runtime.transmitter import TX_LIMITS
from brimline.drivers.air.channel import check_interferer_window, profile
from brimline.drivers.devices.emulated import EMULATED_LIMITS
from brimline.drivers.link.frame import check_link  # the one place the link's rules live
from brimline.drivers.sinks.radio import REOPEN_LIMITS, RadioSink, check_reopen_settings
from brimline.drivers.sources.iqstream import IQ_STREAM_LIMITS, IqStreamDriver
from brimline.drivers.sources.pushed import PUSHED_LIMITS, PushedDriver, check_endpoint
from brimline.drivers.sources.radio import RADIO_LIMITS, RadioDriver
from brimline.drivers.sources.replay import REPLAY_LIMITS

__all__ = [
    "Section",
    "LoadingSection",
    "DriverSection",
    "ReplaySection",
    "PushedSection",
    "IqStreamSection",
    "FallbackSection",
    "ServiceSection",
    "PublishSection",
    "StatusSection",
    "RecordSection",
    "TxSection",
    "EmulatedSection",
    "IqCaptureSection",
    "IQ_CAPTURE_SOURCES",
    "EstimatorSection",
    "ChangeSection",
    "Config",
    "KeyProblem",
    "load_config",
    "read_yaml",
    "ConfigLoader",
    "GuardedLoader",
    "MAX_YAML_NODES",
    "MAX_CONFIG_BYTES",
    "parse_section",
    "parse_override",
    "apply_overrides",
    "config_with",
]


def _keyword_defaults(cls) -> dict[str, Any]:
    """The keyword defaults of ``cls``'s constructor.

    A section whose keys are a constructor's keyword arguments takes its defaults from here, so
    each default is written once, in the constructor's signature.
    """
    return {name: p.default for name, p in inspect.signature(cls).parameters.items()
            if p.default is not inspect.Parameter.empty}


_EST = _keyword_defaults(Estimator)
_MET = _keyword_defaults(MetricsEndpoint)
_RADIO = _keyword_defaults(RadioDriver)
_SINK = _keyword_defaults(RadioSink)
_PUSHED = _keyword_defaults(PushedDriver)
_IQS = _keyword_defaults(IqStreamDriver)
_CHG = _keyword_defaults(ChangeControl)
_OUT = _keyword_defaults(OuterLoop)

#: Frame detection threshold of the receiver, a fraction of the sync metric's peak of 1.
_SYNC_THRESHOLD = between(0.0, 1.0, low_open=True, high_open=True)


def _within(limit: Limit, name: str, v: Optional[float]) -> Optional[float]:
    """``v`` checked against a shared limit rule; None (the key left unset) passes."""
    return v if v is None else limit.check(name, v)


class Section(BaseModel):
    """Base of every config section: frozen, strict types, unknown keys rejected."""

    model_config = ConfigDict(extra="forbid", frozen=True, strict=True)


# --------------------------------------------------------------------------- loading


class LoadingSection(Section):
    """``loading:`` how per-tone SNR becomes bits and power."""

    mode: Literal["rate", "margin", "waterfill"] = Field(
        "rate", description="rate: most bits in the budget; margin: target_bits with most margin")
    bits: list[int] = Field(
        default_factory=lambda: list(range(0, 9)),
        description="allowed bits per tone, ascending, starting at 0")
    gap_db: Optional[float] = Field(
        None, description="SNR gap in dB; when absent it follows from target_ser")
    target_ser: float = Field(1e-7, description="target symbol error rate for the uncoded gap")
    coding_gain_db: float = Field(0.0, description="coding gain subtracted from the gap, dB")
    margin_db: float = Field(3.0, description="target noise margin added to the gap, dB")
    budget_db: float = Field(0.0, description="total power relative to N tones at nominal, dB")
    cap_db: float = Field(math.inf, description="per-tone power ceiling relative to nominal, dB")
    target_bits: Optional[int] = Field(None, description="bits per symbol for mode: margin")

    @field_validator("bits")
    @classmethod
    def _bits_ok(cls, v: list[int]) -> list[int]:
        allowed_bits(v)
        return v

    @field_validator("target_ser")
    @classmethod
    def _ser_ok(cls, v: float) -> float:
        return TARGET_SER.check("target_ser", v)

    @field_validator("gap_db", "coding_gain_db", "margin_db", "budget_db")
    @classmethod
    def _db_ok(cls, v: Optional[float], info) -> Optional[float]:
        return v if v is None else check_db(info.field_name, v)

    @field_validator("cap_db")
    @classmethod
    def _cap_ok(cls, v: float) -> float:
        return check_db("cap_db", v, allow_pos_inf=True)

    @field_validator("target_bits")
    @classmethod
    def _target_ok(cls, v: Optional[int]) -> Optional[int]:
        return v if v is None else check_target_bits(v)

    @model_validator(mode="after")
    def _margin_needs_target(self) -> "LoadingSection":
        if self.mode == "margin" and self.target_bits is None:
            raise ValueError("mode: margin needs target_bits")
        return self

    def effective_gap_db(self) -> float:
        """The gap the loader uses, dB: ``gap_db`` (or the uncoded-QAM gap of ``target_ser``),
        minus ``coding_gain_db``, plus ``margin_db``."""
        if self.gap_db is not None:
            return self.gap_db - self.coding_gain_db + self.margin_db
        return qam_gap_db(self.target_ser, coding_gain_db=self.coding_gain_db,
                          margin_db=self.margin_db)

    def loader(self):
        """Build the :class:`brimline.daemon.core.loading.Loader` this section describes."""
        return Loader(mode=self.mode, bits=self.bits, gap_db=self.effective_gap_db(),
                      budget_db=self.budget_db, cap_db=self.cap_db,
                      target_bits=self.target_bits)


# --------------------------------------------------------------------------- link and drivers
# Each driver subsection's fields are exactly that driver's constructor keyword arguments.


class LinkSection(Section):
    """``link:`` tone plan and frame format; the keys are ``brimline.drivers.link.frame.make_plan``'s.

    Checks that involve several keys (pilots inside the used band, cyclic prefix shorter than the
    FFT, ...) are made in key order by ``brimline.drivers.link.frame.check_link``.
    """

    fft_size: int = Field(256, description="FFT length in samples (power of two, >= 128)")
    cp_len: int = Field(32, description="cyclic prefix in samples")
    sample_rate_hz: float = Field(3.84e6, description="complex sample rate, Hz")
    used_tones_half: int = Field(
        100, description="used tones on each side of DC (bins -U..-1 and 1..U)")
    pilot_spacing: int = Field(
        8, description="every n-th used tone from the band edge inwards is a pilot")
    train_symbols: int = Field(2, description="identical full-band training symbols per frame")
    data_symbols: int = Field(12, description="data symbols per frame")
    max_bits: int = Field(10, description="largest constellation, bits per tone")
    cfo_range_tones: int = Field(8, description="largest frequency offset searched, tone spacings")
    center_hz: Optional[float] = Field(None, description="radio centre frequency, Hz")

    # Defaults are checked too: fft_size 128 with the default used_tones_half must fail here.
    model_config = ConfigDict(extra="forbid", frozen=True, strict=True, validate_default=True)

    @field_validator("*")
    @classmethod
    def _consistent(cls, v, info):
        try:
            check_link(info.field_name, v, info.data)
        except ValueError as exc:  # the message starts with "key=value"; the caller adds it
            raise ValueError(str(exc).split(" ", 1)[1]) from None
        return v


class FadeEventSection(Section):
    """One entry of ``driver.sim.events``: a sudden fade of a band of tones."""

    start_s: float = Field(description="simulated time the fade starts, s")
    stop_s: Optional[float] = Field(None, description="time it ends, s (absent: never)")
    first_tone: int = Field(description="first faded tone, signed FFT bin")
    last_tone: int = Field(description="last faded tone, signed FFT bin (inclusive)")
    depth_db: float = Field(20.0, description="attenuation, dB")

    @field_validator("start_s", "depth_db")
    @classmethod
    def _finite_ok(cls, v, info):
        return _within(FINITE, info.field_name, v)

    @field_validator("stop_s")
    @classmethod
    def _window(cls, v, info):
        start = info.data.get("start_s")
        if v is not None and (math.isnan(v) or (start is not None and not v > start)):
            raise ValueError(f"stop_s={v} must be after start_s={start} (absent: never ends)")
        return v

    @field_validator("last_tone")
    @classmethod
    def _band(cls, v, info):
        first = info.data.get("first_tone")
        if first is not None and v < first:
            raise ValueError(f"last_tone={v} must be >= first_tone={first}")
        return v


class SimSection(Section):
    """``driver.sim:`` the simulated link; keys are ``brimline.drivers.sources.sim.SimDriver``'s."""

    profile: Literal["awgn", "flat", "epa", "eva", "etu", "ped_a", "ped_b", "veh_a",
                     "indoor_a"] = Field("epa", description="multipath profile")
    doppler_hz: float = Field(5.0, description="maximum Doppler shift, Hz")
    snr_db: float = Field(25.0, description="per-tone SNR on a unit channel, dB")
    cfo_hz: float = Field(1500.0, description="carrier frequency offset, Hz")
    lead_max_samples: int = Field(
        64, description="random noise-only samples before each frame (timing offset), max")
    interferer_tone: Optional[float] = Field(
        None, description="narrowband interferer position, signed tone (may be fractional)")
    interferer_db: float = Field(0.0, description="interferer power relative to a nominal tone, dB")
    interferer_start_s: Optional[float] = Field(
        None, description="interferer switched on at this simulated time, s (none: from the start)")
    interferer_stop_s: Optional[float] = Field(
        None, description="interferer switched off at this simulated time, s (none: never)")
    drift_db: float = Field(0.0, description="slow gain drift, peak deviation, dB")
    drift_period_s: float = Field(60.0, description="period of the gain drift, s")
    events: list[FadeEventSection] = Field(
        default_factory=list, description="sudden band fades (adaptation tests)")
    frame_rate_hz: float = Field(50.0, description="frames per second")
    realtime: bool = Field(True, description="pace frames in real time (else as fast as possible)")
    start_s: float = Field(0.0, description="time_s of frame 0, s")
    seed: int = Field(1, description="seed of the simulation's random generator")
    default_bits: int = Field(2, description="bits per tone while no map has been received")
    max_frames: Optional[int] = Field(None, description="stop after this many frames")
    sync_threshold: float = Field(0.3, description="frame detection threshold (0..1)")

    @field_validator("frame_rate_hz", "drift_period_s")
    @classmethod
    def _positive_ok(cls, v, info):
        return POSITIVE.check(info.field_name, v)

    @field_validator("doppler_hz", "lead_max_samples")
    @classmethod
    def _not_negative(cls, v, info):
        return NON_NEGATIVE.check(info.field_name, v)

    @field_validator("sync_threshold")
    @classmethod
    def _threshold(cls, v):
        return _SYNC_THRESHOLD.check("sync_threshold", v)

    @field_validator("snr_db", "cfo_hz", "interferer_tone", "interferer_db", "drift_db",
                     "start_s", "interferer_start_s", "interferer_stop_s")
    @classmethod
    def _finite_ok(cls, v, info):
        return _within(FINITE, info.field_name, v)

    @field_validator("default_bits", "seed")
    @classmethod
    def _count_ok(cls, v, info):
        return _within(at_least(0), info.field_name, v)

    @field_validator("max_frames")
    @classmethod
    def _frames_ok(cls, v):
        return _within(at_least(1), "max_frames", v)

    @field_validator("interferer_stop_s")
    @classmethod
    def _interferer_window(cls, v, info):
        check_interferer_window(info.data.get("interferer_start_s"), v)
        return v


class IqSection(Section):
    """``driver.iq:`` a SigMF IQ recording through the receiver (brimline.drivers.sources.iq)."""

    path: str = Field(description="the recording: NAME, NAME.sigmf-meta or NAME.sigmf-data")
    default_bits: int = Field(2, description="bits per tone of the transmitter's default map")
    start_s: float = Field(0.0, description="time_s of the recording's first sample, s")
    realtime: bool = Field(False, description="pace frames at the recording's own rate")
    max_frames: Optional[int] = Field(None, description="stop after this many frames")
    sync_threshold: float = Field(0.3, description="frame detection threshold (0..1)")

    @field_validator("path")
    @classmethod
    def _path_ok(cls, v):
        # A name that can only be a folder (".", "..", "", "dir/") is refused here, before any
        # file is touched; brimline.drivers.sources.iq.read_sigmf refuses other folders by name.
        if v.endswith(("/", "\\")) or Path(v).name in ("", ".", ".."):
            raise ValueError(f"path={v!r} names a folder; give the recording as NAME, "
                             f"NAME.sigmf-meta or NAME.sigmf-data")
        return v

    @field_validator("start_s")
    @classmethod
    def _start_ok(cls, v):
        return _within(FINITE, "start_s", v)

    @field_validator("default_bits")
    @classmethod
    def _bits_ok(cls, v):
        return _within(at_least(0), "default_bits", v)

    @field_validator("max_frames")
    @classmethod
    def _frames_ok(cls, v):
        return _within(at_least(1), "max_frames", v)

    @field_validator("sync_threshold")
    @classmethod
    def _threshold(cls, v):
        return _SYNC_THRESHOLD.check("sync_threshold", v)


class RadioSection(Section):
    """``driver.radio:`` a pyadi-iio radio (brimline.drivers.sources.radio); tuning is ``link.center_hz``.

    Limits are the driver's ``RADIO_LIMITS``; defaults are its constructor's.
    """

    backend: Literal["iio", "emulated"] = Field(
        "iio", description="iio: a pyadi-iio device; emulated: the emulated radio of the "
                           "emulated: section")
    uri: str = Field(_RADIO["uri"], description="libiio context URI of the radio")
    device: str = Field(_RADIO["device"], description="pyadi-iio class name of the device")
    rx_gain_db: float = Field(_RADIO["rx_gain_db"], description="manual receive gain, dB")
    tx_attenuation_db: float = Field(
        _RADIO["tx_attenuation_db"],
        description="transmit attenuation, dB (>= 0; more is less power)")
    transmit: bool = Field(
        _RADIO["transmit"],
        description="also transmit from this radio, following the maps (single-radio "
                    "loopback; brimline tx's loop with the tx: section's frame settings)")
    buffer_frames: int = Field(_RADIO["buffer_frames"], description="frames per receive buffer")
    default_bits: int = Field(
        _RADIO["default_bits"], description="bits per tone of the transmitter's default map")
    sync_threshold: float = Field(
        _RADIO["sync_threshold"], description="frame detection threshold (0..1)")
    rx_timeout_s: float = Field(
        _RADIO["rx_timeout_s"],
        description="receive timeout (libiio context timeout); a buffer not filled by then is "
                    "a fault and the device is reopened, s")
    backoff_s: float = Field(
        _RADIO["backoff_s"], description="first wait before reopening a faulty device, s")
    backoff_max_s: float = Field(
        _RADIO["backoff_max_s"], description="cap of the reopening wait (it doubles), s")
    max_attempts: int = Field(
        _RADIO["max_attempts"],
        description="failed reopenings in a row after which the source fails (0: never)")
    frame_rate_hz: Optional[float] = Field(
        _RADIO["frame_rate_hz"],
        description="frame slots per second of the transmitter heard (its tx.frame_rate_hz), "
                    "for the sample clock offset; null: this file's tx.frame_rate_hz")

    @field_validator(*RADIO_LIMITS)
    @classmethod
    def _within_limits(cls, v, info):
        if v is None and info.field_name == "frame_rate_hz":
            return v
        return RADIO_LIMITS[info.field_name].check(info.field_name, v)

    @model_validator(mode="after")
    def _backoff_order(self) -> "RadioSection":
        if self.backoff_max_s < self.backoff_s:
            raise KeyProblem(("backoff_max_s",), self.backoff_max_s,
                             f"must be >= backoff_s={self.backoff_s}")
        return self


class PushedSection(Section):
    """``driver.pushed:`` estimates pushed over ZeroMQ by the user's own receiver
    (brimline.drivers.sources.pushed); limits ``PUSHED_LIMITS``, defaults the constructor's."""

    endpoint: str = Field(_PUSHED["endpoint"],
                          description="ZeroMQ endpoint to bind (or connect to, bind: false)")
    bind: bool = Field(_PUSHED["bind"],
                       description="bind the endpoint (senders connect); false: connect to it")
    pattern: Literal["pull", "sub"] = Field(
        _PUSHED["pattern"], description="pull (senders PUSH) or sub (senders PUB)")
    max_message_bytes: int = Field(
        _PUSHED["max_message_bytes"], description="largest message accepted, bytes")
    queue_messages: int = Field(
        _PUSHED["queue_messages"],
        description="messages waiting at most; beyond, the oldest are dropped and counted")
    warn_every_s: float = Field(
        _PUSHED["warn_every_s"],
        description="least time between two warnings about rejected messages, s")

    @field_validator("endpoint")
    @classmethod
    def _endpoint_ok(cls, v):
        return check_endpoint("endpoint", v)

    @field_validator(*PUSHED_LIMITS)
    @classmethod
    def _within_limits(cls, v, info):
        return PUSHED_LIMITS[info.field_name].check(info.field_name, v)


class IqStreamSection(Section):
    """``driver.iq_stream:`` raw IQ over ZeroMQ through the receiver
    (brimline.drivers.sources.iqstream); limits ``IQ_STREAM_LIMITS``, defaults the constructor's."""

    endpoint: str = Field(_IQS["endpoint"],
                          description="ZeroMQ endpoint to connect to (or bind, bind: true)")
    bind: bool = Field(_IQS["bind"], description="bind the endpoint instead of connecting")
    pattern: Literal["sub", "pull"] = Field(
        _IQS["pattern"], description="sub (the sender PUBs) or pull (the sender PUSHes)")
    sample_format: Literal["cf32", "ci16"] = Field(
        _IQS["sample_format"],
        description="cf32: complex float32; ci16: complex int16, full scale 32768")
    default_bits: int = Field(
        _IQS["default_bits"], description="bits per tone of the transmitter's default map")
    sync_threshold: float = Field(
        _IQS["sync_threshold"], description="frame detection threshold (0..1)")
    max_message_bytes: int = Field(
        _IQS["max_message_bytes"], description="largest message accepted, bytes")
    queue_messages: int = Field(_IQS["queue_messages"],
                                description="receive queue of the socket, messages")
    warn_every_s: float = Field(
        _IQS["warn_every_s"],
        description="least time between two warnings about dropped messages, s")
    start_s: float = Field(_IQS["start_s"], description="time_s of the first sample, s")

    @field_validator("endpoint")
    @classmethod
    def _endpoint_ok(cls, v):
        return check_endpoint("endpoint", v)

    @field_validator(*IQ_STREAM_LIMITS)
    @classmethod
    def _within_limits(cls, v, info):
        return IQ_STREAM_LIMITS[info.field_name].check(info.field_name, v)


class ReplaySection(Section):
    """``driver.replay:`` a recorded estimate log (brimline.drivers.sources.replay).

    A relative ``path`` is taken relative to the config file's folder by :func:`load_config`.
    """

    path: str = Field(description="estimate recording to replay (relative: to the config file)")
    realtime: bool = Field(False, description="pace frames by their recorded time_s")
    speed: float = Field(1.0, description="pacing factor when realtime (2.0 = twice as fast)")
    loop: bool = Field(False, description="start again at the end (times keep increasing)")

    @field_validator(*REPLAY_LIMITS)
    @classmethod
    def _within_limits(cls, v, info):
        return REPLAY_LIMITS[info.field_name].check(info.field_name, v)


class DriverSection(Section):
    """``driver:`` which source of estimates runs, and its settings.

    ``kind`` names the subsection that configures the source; that subsection must be present
    (``sim`` has defaults, the others need at least their required keys).
    """

    kind: Literal["sim", "iq", "radio", "replay", "pushed", "iq_stream"] = Field(
        "sim", description="source of estimates: sim, iq (SigMF IQ), radio, replay, pushed "
                           "(estimates over ZeroMQ), iq_stream (raw IQ over ZeroMQ)")
    sim: SimSection = Field(default_factory=SimSection)
    iq: Optional[IqSection] = None
    radio: Optional[RadioSection] = None
    replay: Optional[ReplaySection] = None
    pushed: Optional[PushedSection] = None
    iq_stream: Optional[IqStreamSection] = None

    @model_validator(mode="after")
    def _kind_has_section(self) -> "DriverSection":
        if getattr(self, self.kind) is None:
            raise KeyProblem(("kind",), self.kind,
                             f"needs a driver.{self.kind} section with its settings")
        return self

    def selected(self) -> Section:
        """The subsection named by ``kind``."""
        return getattr(self, self.kind)

    @property
    def live(self) -> bool:
        """Whether the source is live (a radio or a socket): decisions then run on the daemon's
        monotonic clock under ``service.clock: auto``."""
        return self.kind in ("radio", "pushed", "iq_stream")


# --------------------------------------------------------------------------- estimator, change


class EstimatorSection(Section):
    """``estimator:`` per-tone SNR tracking (brimline.daemon.core.estimator.Estimator).

    Defaults suit a slowly fading indoor link (people moving about: Doppler of a few tenths of a
    hertz, a coherence time of a second or more) estimated at tens to hundreds of frames per
    second with about 1 dB of per-frame estimation noise. Fades faster than tau_s are followed by
    the lag-driven gain (lag_sigmas, tau_min_s), which shortens the smoothing only where the
    innovations show the tracked SNR lagging.
    """

    tau_s: float = Field(
        _EST["tau_s"],
        description="time constant of the per-tone exponential smoothing of SNR in dB, s")
    std_tau_s: float = Field(
        _EST["std_tau_s"],
        description="time constant of the per-tone variance tracker, s")
    std_init_db: float = Field(
        _EST["std_init_db"],
        description="uncertainty (std, dB) given to a tone before its variance is learnt")
    backoff_sigmas: float = Field(
        _EST["backoff_sigmas"],
        description="effective SNR = smoothed SNR minus this many std (frame spread and "
                    "uncertainty of the tracked value combined), so noisy tones carry fewer "
                    "bits")
    outlier_db: float = Field(
        _EST["outlier_db"],
        description="smallest gate, dB: a tone further than this (and than "
                    "outlier_sigmas std) from its tracked value is held as an outlier")
    outlier_sigmas: float = Field(
        _EST["outlier_sigmas"],
        description="gate width in per-tone std; the wider of this and outlier_db applies")
    confirm_frames: int = Field(
        _EST["confirm_frames"],
        description="consecutive agreeing outlier frames after which a tone's change is "
                    "accepted as real and the tone jumps to it")
    frame_outlier_fraction: float = Field(
        _EST["frame_outlier_fraction"],
        description="a frame with more than this fraction of tones outside their gate is "
                    "a whole-frame outlier (counted; no tone is smoothed with it)")
    stale_s: float = Field(
        _EST["stale_s"],
        description="after a gap longer than this between accepted frames, tracking "
                    "starts afresh from the next frame, s")
    tone_window: int = Field(
        _EST["tone_window"],
        description="half-width in tones of the smoothing across neighbours (0: off)")
    tone_agree_db: float = Field(
        _EST["tone_agree_db"],
        description="a pair of neighbours (one each side) is averaged in only where both "
                    "are within this of the tone, dB; deeper notches and interferers stay "
                    "intact")
    trend_tau_s: float = Field(
        _EST["trend_tau_s"],
        description="time constant of the per-tone SNR slope tracker (Holt's linear "
                    "trend), s; the tracked SNR follows a steady fade without lag; 0: off "
                    "(plain exponential smoothing)")
    lag_sigmas: float = Field(
        _EST["lag_sigmas"],
        description="where the innovations' short-term mean, pooled over neighbouring "
                    "tones, stands more than this many noise spreads off zero (the tracked "
                    "SNR lags a fade) the smoothing time constant shortens towards "
                    "tau_min_s; 0: off")
    tau_min_s: float = Field(
        _EST["tau_min_s"],
        description="shortest smoothing time constant while a fade is followed, and the "
                    "time constant of the innovations' short-term mean, s")
    predict_s: float = Field(
        _EST["predict_s"],
        description="far end of the horizon over which each tone's complex channel is "
                    "predicted (newest estimate to the end of the next map's shortest life), "
                    "s; each tone is loaded on its worst predicted SNR over it; 0: off")
    predict_window: int = Field(
        _EST["predict_window"],
        description="estimates each prediction of the channel is made from")
    predict_sigmas: float = Field(
        _EST["predict_sigmas"],
        description="measured prediction errors (beyond the one-frame error) taken off the "
                    "predicted channel magnitude")
    predict_delay_width: float = Field(
        _EST["predict_delay_width"],
        description="half-width of the channel's delay window times the tone spacing "
                    "(cycles per tone): estimates are projected on the channels of that "
                    "delay spread before prediction (0.075: 5 us at 15 kHz tones); 0: off")

    @field_validator(*ESTIMATOR_LIMITS)
    @classmethod
    def _within_limits(cls, v, info):
        return ESTIMATOR_LIMITS[info.field_name].check(info.field_name, v)


class ChangeSection(Section):
    """``change:`` change control (brimline.daemon.core.change.ChangeControl).

    Margins are per-tone margins of the current map under the tracked effective SNR, in dB
    relative to the loading gap (which already includes ``loading.margin_db``): 0 dB means a
    tone sits exactly at the loading target. Upgrades are slower and need more evidence than
    downgrades, after the separate upshift/downshift margins and minimum times of DSL online
    reconfiguration.
    """

    downshift_margin_db: float = Field(
        _CHG["downshift_margin_db"],
        description="a loaded tone whose margin falls below this forces a new map, dB")
    upshift_margin_db: float = Field(
        _CHG["upshift_margin_db"],
        description="an upgrade is made only when a map loaded with this much extra "
                    "margin on every tone still gains min_gain_bits, dB")
    min_gain_bits: int = Field(
        _CHG["min_gain_bits"],
        description="smallest gain in bits per symbol worth an upgrade")
    down_dwell_s: float = Field(
        _CHG["down_dwell_s"],
        description="minimum time since the last map before a downgrade (bit swap or "
                    "reload), s")
    down_persist_s: float = Field(
        _CHG["down_persist_s"],
        description="a loaded tone counts as below downshift_margin_db only once it has "
                    "stayed below on every frame for this long (0.06 s: 3 frame times, "
                    "the 4th frame in a row, at 50 frames/s), so a dip of a frame or two "
                    "changes nothing; emergencies do not wait for it, s")
    down_deep_db: float = Field(
        _CHG["down_deep_db"],
        description="a loaded tone more than this below downshift_margin_db counts at "
                    "once, without down_persist_s; .inf: never, dB")
    up_dwell_s: float = Field(
        _CHG["up_dwell_s"],
        description="an upgrade is made once it has been worth it (see upshift_margin_db) "
                    "for this long without a break; upgrades, emergencies and first maps "
                    "are at least this far apart, s")
    upgrade_check_s: float = Field(
        _CHG["upgrade_check_s"],
        description="how often an upgrade is evaluated (one loader run), s")
    max_maps_per_s: float = Field(
        _CHG["max_maps_per_s"],
        description="no two maps closer than 1/this, emergencies included, 1/s")
    swap_max_tones: int = Field(
        _CHG["swap_max_tones"],
        description="a bit swap changes at most this many tones; larger changes reload")
    swap_max_loss_bits: int = Field(
        _CHG["swap_max_loss_bits"],
        description="a bit swap may lose at most this many bits per symbol, else reload")
    emergency_fraction: float = Field(
        _CHG["emergency_fraction"],
        description="this fraction of loaded tones below the downshift margin at once, "
                    "with the mean SNR down by at least -downshift_margin_db, triggers an "
                    "emergency downshift")
    emergency_drop_db: float = Field(
        _CHG["emergency_drop_db"],
        description="a drop of the mean tracked SNR by this much since the current map "
                    "triggers an emergency downshift, dB")
    emergency_margin_db: float = Field(
        _CHG["emergency_margin_db"],
        description="extra margin of the emergency map, dB (recovered by upgrades)")
    common_drop_db: float = Field(
        _CHG["common_drop_db"],
        description="when most loaded tones moved together (within this of their median) "
                    "and that median fell by this much since the map, one reload repairs the "
                    "band instead of bit swaps tone by tone, dB")
    sag_db: float = Field(
        _CHG["sag_db"],
        description="the median margin of the loaded tones below -this counts as sagging, dB")
    sag_max_s: float = Field(
        _CHG["sag_max_s"],
        description="a map whose median margin sagged this long is reloaded, s")
    lookahead_s: float = Field(
        _CHG["lookahead_s"],
        description="maps are made for each tone's tracked SNR this far ahead along its "
                    "present downward slope, so a map lasts through fading (0: off), s")
    slope_tau_s: float = Field(
        _CHG["slope_tau_s"],
        description="time constant of the per-tone slope tracker used by lookahead_s, s")

    @field_validator(*CHANGE_LIMITS)
    @classmethod
    def _within_limits(cls, v, info):
        return CHANGE_LIMITS[info.field_name].check(info.field_name, v)

    @model_validator(mode="after")
    def _keys_agree(self) -> "ChangeSection":
        check_change_settings(self.model_dump())
        return self


class OuterSection(Section):
    """``outer:`` the outer margin loop (brimline.daemon.core.outer.OuterLoop).

    Frame outcomes from the receiver side (``publish.outcome_endpoint``) steer an offset added to
    the loading gap so that the frame error rate settles at ``target_fer``. Without outcomes for
    ``quiet_s`` the offset is 0 dB.
    """

    target_fer: float = Field(_OUT["target_fer"], description="frame error rate to settle at")
    step_up_db: float = Field(
        _OUT["step_up_db"],
        description="offset added per errored frame; a good frame takes off "
                    "step_up_db * target_fer / (1 - target_fer), dB")
    min_offset_db: float = Field(_OUT["min_offset_db"], description="lowest offset (<= 0), dB")
    max_offset_db: float = Field(_OUT["max_offset_db"], description="highest offset (>= 0), dB")
    window_frames: int = Field(_OUT["window_frames"],
                               description="outcomes over which status shows the error rate")
    quiet_s: float = Field(
        _OUT["quiet_s"], description="no outcome for this long: the loop is off (offset 0 dB), s")

    @field_validator(*OUTER_LIMITS)
    @classmethod
    def _within_limits(cls, v, info):
        return OUTER_LIMITS[info.field_name].check(info.field_name, v)

    @model_validator(mode="after")
    def _keys_agree(self) -> "OuterSection":
        check_outer_settings(self.model_dump())
        return self


# --------------------------------------------------------------------------- publish, status, record


_ENDPOINT_SCHEMES = ("tcp://", "ipc://", "inproc://")


def _endpoint_ok(key: str, v: Optional[str]) -> Optional[str]:
    if v is not None and (not v.startswith(_ENDPOINT_SCHEMES) or len(v) <= len("tcp://")):
        raise ValueError(f"{key}={v!r} must be a ZeroMQ endpoint such as tcp://127.0.0.1:7341")
    if v is not None and v.startswith("tcp://"):
        host, colon, port = v[len("tcp://"):].rpartition(":")
        if not colon or not host:
            raise ValueError(f"{key}={v!r} needs host:port, e.g. tcp://127.0.0.1:7341")
        # ZeroMQ binds "*" (and 0, which the tests use) to any free port; a port past 65535
        # must not be passed on: it was seen to bind another port.
        if port != "*" and not (port.isascii() and port.isdigit() and int(port) <= 65535):
            raise ValueError(f"{key}={v!r}: port {port!r} must be an integer in [0, 65535] "
                             f"(0 or *: any free port)")
    return v


def _fixed_endpoint(v: Optional[str]) -> bool:
    """Whether two sockets binding ``v`` would collide (not "any free port")."""
    return v is not None and not v.endswith((":0", ":*"))


class PublishSection(Section):
    """``publish:`` map, snapshot, heartbeat and acknowledgement sockets.

    Fields are the keyword arguments of ``brimline.daemon.net.publisher.MapPublisher`` (which also
    takes ``context`` and ``epoch`` from the service). Endpoints are where the daemon binds;
    keep them on 127.0.0.1 unless CURVE is on.
    """

    map_endpoint: str = Field("tcp://127.0.0.1:7341",
                              description="PUB for maps and heartbeats (bind)")
    snapshot_endpoint: str = Field("tcp://127.0.0.1:7342",
                                   description="ROUTER answering current-map requests (bind)")
    ack_endpoint: Optional[str] = Field("tcp://127.0.0.1:7344",
                                        description="PULL for transmitter acks; null for none")
    outcome_endpoint: Optional[str] = Field(
        None, description="PULL for the receiver side's frame outcomes (outer margin loop); "
                          "null for none")
    heartbeat_s: float = Field(0.5, description="heartbeat interval, seconds")
    map_hwm: int = Field(1000, description="map PUB send high-water mark, messages")
    linger_s: float = Field(1.0, description="time unsent maps are kept at shutdown, seconds")
    curve_secret_key: Optional[str] = Field(
        None, description="daemon's .key_secret file (brimline keys); turns CURVE on")
    curve_clients_dir: Optional[str] = Field(
        None, description="folder of authorised clients' .key files; null admits any client "
                          "that knows the daemon's public key")

    @field_validator("map_endpoint", "snapshot_endpoint", "ack_endpoint", "outcome_endpoint")
    @classmethod
    def _endpoints(cls, v, info):
        return _endpoint_ok(info.field_name, v)

    @field_validator(*PUBLISH_LIMITS)
    @classmethod
    def _within_limits(cls, v, info):
        return PUBLISH_LIMITS[info.field_name].check(info.field_name, v)

    @model_validator(mode="after")
    def _keys_agree(self):
        check_publish_settings(self.model_dump())
        return self


class StatusSection(Section):
    """``status:`` the operators' status stream.

    Fields are the keyword arguments of ``brimline.daemon.net.publisher.StatusPublisher`` (which
    also takes ``curve`` and ``context`` from the service).
    """

    endpoint: str = Field("tcp://127.0.0.1:7343", description="status PUB (bind)")
    rate_hz: float = Field(4.0, description="periodic status messages per second")
    hwm: int = Field(10, description="send high-water mark per subscriber, messages; small so "
                                     "a stalled watcher costs nothing")

    @field_validator("endpoint")
    @classmethod
    def _endpoint(cls, v):
        return _endpoint_ok("endpoint", v)

    @field_validator(*STATUS_LIMITS)
    @classmethod
    def _within_limits(cls, v, info):
        return STATUS_LIMITS[info.field_name].check(info.field_name, v)


class MetricsSection(Section):
    """``metrics:`` the optional Prometheus endpoint (``brimline.daemon.net.metrics``).

    ``host`` and ``port`` are the keyword arguments of ``MetricsEndpoint`` (defaults and limits
    from there); ``enabled`` turns it on, which needs the ``metrics`` extra installed.
    """

    enabled: bool = Field(False, description="serve /metrics over HTTP (needs the metrics extra)")
    host: str = Field(_MET["host"], description="address to bind; loopback unless firewalled")
    port: int = Field(_MET["port"], description="TCP port (0: any free port)")

    @field_validator(*METRICS_LIMITS)
    @classmethod
    def _within_limits(cls, v, info):
        return METRICS_LIMITS[info.field_name].check(info.field_name, v)

    @field_validator("host")
    @classmethod
    def _host_ok(cls, v: str) -> str:
        if not v or any(c.isspace() for c in v) or "/" in v:
            raise ValueError(f"host={v!r} must be an address such as 127.0.0.1")
        return v


class IqCaptureSection(Section):
    """``record.iq:`` the SigMF IQ capture written while the daemon runs from an IQ source.

    Fields are keyword arguments of ``brimline.daemon.wire.sigmf.CaptureWriter`` (the runtime adds
    the sample rate, centre frequency and tone plan from the ``link`` section); ``path: null``
    captures nothing.
    """

    path: Optional[str] = Field(
        None, description="SigMF capture to create, NAME (relative: to the config file); null "
        "for none")
    datatype: Literal["cf32_le", "ci16_le"] = Field(
        "ci16_le", description="sample format: ci16_le (4 bytes a sample) or cf32_le (8)")

    @field_validator("path")
    @classmethod
    def _path_ok(cls, v):
        if v is not None and (v.endswith(("/", "\\")) or Path(v).name in ("", ".", "..")):
            raise ValueError(f"path={v!r} names a folder; give the capture as NAME")
        return v


#: Sources that feed the IQ capture (``record.iq``): each takes a ``capture`` writer and feeds
#: it through brimline.drivers.sources.base.CaptureFeed.
IQ_CAPTURE_SOURCES = ("iq", "radio")


class RecordSection(Section):
    """``record:`` what the daemon records, and where.

    Fields other than ``iq`` are the keyword arguments of
    ``brimline.daemon.wire.recording.RecordWriter`` (which also takes ``meta``; see
    :meth:`writer_arguments`); ``path: null`` records nothing. ``iq`` is the IQ capture
    (:class:`IqCaptureSection`).
    """

    path: Optional[str] = Field(None, description="recording file to create; null for none")
    topics: Optional[list[str]] = Field(
        default_factory=lambda: ["estimate", "map", "decision", "status"],
        description="topics to record; null for all")
    max_bytes: Optional[int] = Field(
        None, description="start a new file NAME.0001.EXT, ... beyond this size, bytes")
    fsync: bool = Field(False, description="fsync every record (survives power loss, slower)")

    @field_validator("max_bytes")
    @classmethod
    def _max_bytes(cls, v):
        # the same floor as RecordWriter's own check (brimline.daemon.wire.recording)
        return v if v is None else at_least(1024).check("max_bytes", v)

    iq: IqCaptureSection = Field(default_factory=IqCaptureSection)

    def writer_arguments(self) -> dict:
        """The keyword arguments of ``RecordWriter`` (every key but ``iq``)."""
        return self.model_dump(exclude={"iq"})


# --------------------------------------------------------------------------- whole file


class FallbackSection(Section):
    """``fallback:`` the safe map sent when estimates go stale (owned by the service).

    The fallback map loads every data tone with the same ``bits`` at the same ``power_db``; it
    must be a map the loader itself could make (bits from ``loading.bits``, power within
    ``loading.cap_db`` and, summed over the tones, within ``loading.budget_db``).
    """

    stale_after_s: float = Field(
        1.0, description="send the fallback map when no valid estimate came for this long, s")
    bits: int = Field(2, description="bits on every data tone of the fallback map")
    power_db: float = Field(0.0, description="power on every data tone relative to nominal, dB")

    @field_validator("stale_after_s")
    @classmethod
    def _stale_ok(cls, v: float) -> float:
        return POSITIVE.check("stale_after_s", v)

    @field_validator("power_db")
    @classmethod
    def _power_ok(cls, v: float) -> float:
        return FINITE.check("power_db", v)


class ServiceSection(Section):
    """``service:`` how the daemon loop runs (brimline.daemon.runtime.service)."""

    lead_frames: int = Field(
        4, description="a new map takes effect this many frames after the last frame seen; "
        "the most, once the follower's acknowledgements show a shorter lead is met")
    clock: Literal["auto", "source", "monotonic"] = Field(
        "auto", description="time fed to estimator and change control: source = the estimates' "
        "time_s, monotonic = the daemon's clock; auto = monotonic for radio, source otherwise")
    state_path: Optional[str] = Field(
        None, description="file keeping epoch, sequence and last map across restarts "
        "(relative: to the config file); none keeps no state")
    poll_s: float = Field(0.05, description="longest wait of one main-loop poll, s")
    driver_join_s: float = Field(2.0, description="wait for the driver thread at shutdown, s")

    @field_validator("lead_frames")
    @classmethod
    def _lead_ok(cls, v: int) -> int:
        return between(0, 10_000).check("lead_frames", v)

    @field_validator("poll_s", "driver_join_s")
    @classmethod
    def _positive_s(cls, v: float, info) -> float:
        return POSITIVE.check(info.field_name, v)


class EmulatedSection(Section):
    """``emulated:`` the emulated radio (brimline.drivers.devices.emulated.EmulatedRadio).

    Used by a radio whose ``backend`` is ``emulated`` (``driver.radio`` or ``tx``). Fields are
    the device's keyword arguments; their ranges are ``EMULATED_LIMITS`` beside it.
    """

    air_endpoint: str = Field("tcp://127.0.0.1:7350",
                              description="loopback air socket (the transmitter binds it)")
    snr_db: float = Field(30.0, description="SNR of a unit-power tone at the receiver, dB")
    profile: str = Field("awgn", description="multipath profile (as driver.sim.profile)")
    doppler_hz: float = Field(0.0, description="maximum Doppler shift, Hz")
    cfo_hz: float = Field(0.0, description="carrier frequency offset, Hz")
    path_gain_db: float = Field(0.0, description="gain from transmitter output to receiver "
                                                 "input, dB")
    seed: int = Field(1, description="seed of the channel's random generator")
    overflow_every: int = Field(0, description="fault: half a buffer lost before every N-th "
                                               "receive buffer (0: never)")
    rx_timeout_every: int = Field(0, description="fault: every N-th receive times out "
                                                 "(0: never)")
    tx_underrun_every: int = Field(0, description="fault: every N-th transmit buffer period "
                                                  "is missed (0: never)")
    vanish_after_s: Optional[float] = Field(
        None, description="fault: the device is gone from this long after it was first "
                          "opened, s (null: never)")
    vanish_for_s: float = Field(0.0, description="fault: for this long, s")
    clock_ppm: float = Field(0.0, description="fault: receiver sample clock error, ppm")

    @field_validator("air_endpoint")
    @classmethod
    def _endpoint(cls, v):
        return _endpoint_ok("air_endpoint", v)

    @field_validator(*EMULATED_LIMITS)
    @classmethod
    def _within_limits(cls, v, info):
        return _within(EMULATED_LIMITS[info.field_name], info.field_name, v)


class TxSection(Section):
    """``tx:`` the transmitter side, ``brimline tx`` (brimline.daemon.runtime.transmitter).

    It follows the maps of the daemon described by ``publish`` (and checks them against
    ``loading``), with the tone plan of ``link``. Ranges are ``TX_LIMITS`` beside ``TxLoop``.
    """

    sink: Literal["radio", "sigmf", "stream"] = Field(
        "radio", description="where frames go: radio, sigmf (IQ file), stream (raw IQ over "
                             "ZeroMQ)")
    backend: Literal["iio", "emulated"] = Field(
        "iio", description="radio sink: iio (pyadi-iio) or emulated (the emulated: section)")
    uri: str = Field("ip:192.168.2.1", description="radio sink: libiio context URI")
    device: str = Field("Pluto", description="radio sink: pyadi-iio class name")
    attenuation_db: float = Field(
        30.0, description="radio sink: hardware transmit attenuation, dB (no map lowers it)")
    backoff_db: float = Field(
        12.0, description="digital backoff: RMS of a frame of nominal tones below full "
                          "scale, dB")
    max_tone_db: float = Field(0.0, description="power bound: largest power of one tone "
                                                "relative to nominal, dB")
    max_total_db: float = Field(0.0, description="power bound: largest total power relative "
                                                 "to every tone at nominal, dB")
    frame_rate_hz: float = Field(50.0, description="frame slots per second")
    default_bits: int = Field(2, description="bits per tone before the first map and in the "
                                             "safe map")
    hold_s: float = Field(2.0, description="keep the last good map this long after "
                                           "heartbeats stop, s")
    on_loss: Literal["safe", "silent"] = Field(
        "safe", description="after the hold: safe (default map) or silent")
    max_lead_frames: int = Field(
        1000, description="a map naming a frame further ahead is applied at once")
    path: Optional[str] = Field(None, description="sigmf sink: the recording to create "
                                                  "(relative: to the config file)")
    stream_endpoint: str = Field("tcp://127.0.0.1:7351",
                                 description="stream sink: ZeroMQ endpoint")
    stream_pattern: Literal["pub", "push"] = Field("pub",
                                                   description="stream sink: pub or push")
    stream_bind: bool = Field(True, description="stream sink: bind (true) or connect")
    realtime: bool = Field(True, description="pace unpaced sinks (file, stream) in real time")
    max_frames: Optional[int] = Field(None, description="stop after this many frame slots")
    seed: int = Field(1, description="seed of the payload generator")
    status_endpoint: str = Field("tcp://127.0.0.1:7345",
                                 description="the transmitter's status PUB (bind)")
    status_rate_hz: float = Field(4.0, description="periodic status messages per second")
    curve_daemon_key: Optional[str] = Field(
        None, description="the daemon's public .key file: follow it over CURVE (with "
                          "curve_own_key)")
    curve_own_key: Optional[str] = Field(
        None, description="this transmitter's .key_secret file (brimline keys); its .key goes "
                          "in the daemon's publish.curve_clients_dir")
    reopen_backoff_s: float = Field(
        _SINK["reopen_backoff_s"],
        description="radio sink: first wait before rebuilding a failed device, s")
    reopen_backoff_max_s: float = Field(
        _SINK["reopen_backoff_max_s"], description="radio sink: cap of that wait (it doubles), s")
    reopen_max_attempts: int = Field(
        _SINK["reopen_max_attempts"],
        description="radio sink: failed rebuilds in a row after which tx stops (0: never)")

    @field_validator(*REOPEN_LIMITS)
    @classmethod
    def _reopen_within_limits(cls, v, info):
        return _within(REOPEN_LIMITS[info.field_name], info.field_name, v)

    @model_validator(mode="after")
    def _curve_pair(self) -> "TxSection":
        if (self.curve_daemon_key is None) != (self.curve_own_key is None):
            missing = "curve_own_key" if self.curve_own_key is None else "curve_daemon_key"
            raise KeyProblem((missing,), None, "tx.curve_daemon_key and tx.curve_own_key go "
                                               "together (CURVE needs both)")
        return self

    @model_validator(mode="after")
    def _reopen_order(self) -> "TxSection":
        if check_reopen_settings(self.reopen_backoff_s, self.reopen_backoff_max_s):
            raise KeyProblem(("reopen_backoff_max_s",), self.reopen_backoff_max_s,
                             f"must be >= tx.reopen_backoff_s={self.reopen_backoff_s}")
        return self

    @field_validator("stream_endpoint", "status_endpoint")
    @classmethod
    def _endpoints(cls, v, info):
        return _endpoint_ok(info.field_name, v)

    @field_validator(*TX_LIMITS)
    @classmethod
    def _within_limits(cls, v, info):
        return _within(TX_LIMITS[info.field_name], info.field_name, v)


class KeyProblem(ValueError):
    """A cross-section check failed at ``loc`` (key path inside the model) with ``value``."""

    def __init__(self, loc: tuple[str, ...], value: Any, msg: str) -> None:
        super().__init__(msg)
        self.loc = tuple(loc)
        self.value = value
        self.msg = msg


class Config(Section):
    """The whole daemon config. Sections not written in the file take their defaults."""

    link: LinkSection = Field(default_factory=LinkSection)
    driver: DriverSection = Field(default_factory=DriverSection)
    estimator: EstimatorSection = Field(default_factory=EstimatorSection)
    loading: LoadingSection = Field(default_factory=LoadingSection)
    change: ChangeSection = Field(default_factory=ChangeSection)
    outer: Optional[OuterSection] = Field(
        None, description="outer margin loop; absent: none (outer: {} for the defaults)")
    publish: PublishSection = Field(default_factory=PublishSection)
    status: StatusSection = Field(default_factory=StatusSection)
    metrics: MetricsSection = Field(default_factory=MetricsSection)
    record: RecordSection = Field(default_factory=RecordSection)
    fallback: FallbackSection = Field(default_factory=FallbackSection)
    service: ServiceSection = Field(default_factory=ServiceSection)
    tx: TxSection = Field(default_factory=TxSection)
    emulated: EmulatedSection = Field(default_factory=EmulatedSection)

    @model_validator(mode="after")
    def _fits_link(self) -> "Config":
        link, d = self.link, self.driver
        top = max(self.loading.bits)
        if top > link.max_bits:
            raise KeyProblem(("loading", "bits"), list(self.loading.bits),
                             f"go above link.max_bits={link.max_bits}, the largest "
                             f"constellation the link carries")
        for kind in ("sim", "iq", "radio", "iq_stream"):
            section = getattr(d, kind)
            if section is not None and section.default_bits > link.max_bits:
                raise KeyProblem(("driver", kind, "default_bits"), section.default_bits,
                                 f"must be in [0, link.max_bits={link.max_bits}]")
        sim = d.sim
        for i, event in enumerate(sim.events):
            if event.last_tone < -link.used_tones_half or event.first_tone > link.used_tones_half:
                raise KeyProblem(("driver", "sim", "events", str(i), "first_tone"),
                                 [event.first_tone, event.last_tone],
                                 f"the faded band misses the used tones "
                                 f"[-{link.used_tones_half}, {link.used_tones_half}]")
        slot = int(link.sample_rate_hz / sim.frame_rate_hz)
        if sim.lead_max_samples > slot:
            raise KeyProblem(("driver", "sim", "lead_max_samples"), sim.lead_max_samples,
                             f"exceeds the samples of one frame interval "
                             f"(link.sample_rate_hz / driver.sim.frame_rate_hz = {slot})")
        return self

    @model_validator(mode="after")
    def _capture_has_iq(self) -> "Config":
        path = self.record.iq.path
        if path is not None and self.driver.kind not in IQ_CAPTURE_SOURCES:
            raise KeyProblem(("record", "iq", "path"), path,
                             f"needs an IQ source (driver.kind {' or '.join(IQ_CAPTURE_SOURCES)}"
                             f"), not driver.kind={self.driver.kind}")
        return self

    @model_validator(mode="after")
    def _endpoints_distinct(self) -> "Config":
        seen: dict[str, str] = {}
        locs = [("publish", "map_endpoint"), ("publish", "snapshot_endpoint"),
                ("publish", "ack_endpoint"), ("publish", "outcome_endpoint"),
                ("status", "endpoint"),
                ("tx", "status_endpoint")]
        for kind in ("pushed", "iq_stream"):  # a socket source that binds, when chosen
            section = getattr(self.driver, kind)
            if self.driver.kind == kind and section is not None and section.bind:
                locs.append(("driver", kind, "endpoint"))
        for loc in locs:
            value = getattr(self.driver, loc[1]).endpoint if loc[0] == "driver" else \
                getattr(getattr(self, loc[0]), loc[1])
            if not _fixed_endpoint(value):
                continue
            if value in seen:
                raise KeyProblem(loc, value, f"is also {seen[value]}; each socket binds its "
                                             f"own endpoint")
            seen[value] = ".".join(loc)
        return self

    @model_validator(mode="after")
    def _tx_fits(self) -> "Config":
        tx, link = self.tx, self.link
        if tx.default_bits > link.max_bits:
            raise KeyProblem(("tx", "default_bits"), tx.default_bits,
                             f"must be in [0, link.max_bits={link.max_bits}]")
        if tx.default_bits not in self.loading.bits:
            raise KeyProblem(("tx", "default_bits"), tx.default_bits,
                             f"is not one of loading.bits={list(self.loading.bits)}")
        slot = link.sample_rate_hz / tx.frame_rate_hz
        frame_len = (2 + link.train_symbols + link.data_symbols) * (link.fft_size + link.cp_len)
        if round(slot) < frame_len:
            raise KeyProblem(("tx", "frame_rate_hz"), tx.frame_rate_hz,
                             f"leaves {slot:.0f} samples per slot; a frame needs {frame_len}")
        if tx.sink == "sigmf" and tx.path is None:
            raise KeyProblem(("tx", "path"), None, "the sigmf sink needs a recording path")
        try:
            profile(self.emulated.profile)
        except ValueError as exc:
            raise KeyProblem(("emulated", "profile"), self.emulated.profile, str(exc)) from None
        return self

    @model_validator(mode="after")
    def _fallback_fits_loading(self) -> "Config":
        fb, ld = self.fallback, self.loading
        if fb.bits not in ld.bits:
            raise KeyProblem(("fallback", "bits"), fb.bits,
                             f"is not one of loading.bits={list(ld.bits)}")
        if fb.bits == 0:
            raise KeyProblem(("fallback", "bits"), fb.bits, "a fallback map must carry data")
        if fb.power_db > ld.cap_db + 1e-9:
            raise KeyProblem(("fallback", "power_db"), fb.power_db,
                             f"exceeds the per-tone ceiling loading.cap_db={ld.cap_db}")
        # Uniform power on all N tones sums to N * 10^(p/10); the budget is N * 10^(b/10).
        if fb.power_db > ld.budget_db + 1e-9:
            raise KeyProblem(("fallback", "power_db"), fb.power_db,
                             f"on every tone exceeds the total budget loading.budget_db="
                             f"{ld.budget_db}")
        return self


# --------------------------------------------------------------------------- machinery


class ConfigLoader(yaml.SafeLoader):
    """PyYAML's safe loader, reading numbers in exponent form (``1e6``, ``-2.5E-3``) as floats.

    PyYAML follows YAML 1.1, whose float needs a dot and a signed exponent (``1.0e+6``), so
    ``sample_rate_hz: 1e6`` arrived as the string ``'1e6'`` and was refused. YAML 1.2's core
    schema reads any ``[-+]? ( . [0-9]+ | [0-9]+ ( . [0-9]* )? ) ( [eE] [-+]? [0-9]+ )?`` as a
    float; that rule is added here after the YAML 1.1 ones, so integers stay integers.
    """


ConfigLoader.add_implicit_resolver(
    "tag:yaml.org,2002:float",
    re.compile(r"^[-+]?(?:\.[0-9]+|[0-9]+(?:\.[0-9]*)?)(?:[eE][-+]?[0-9]+)?$"),
    list("-+0123456789."))


def _key_lines(node: yaml.Node, prefix: tuple = ()) -> dict[tuple, int]:
    """Map each key path in a composed YAML tree to its 1-based line number."""
    lines: dict[tuple, int] = {}
    if isinstance(node, yaml.MappingNode):
        for key_node, value_node in node.value:
            path = prefix + (str(key_node.value),)
            lines[path] = key_node.start_mark.line + 1
            lines.update(_key_lines(value_node, path))
    elif isinstance(node, yaml.SequenceNode):
        for i, item in enumerate(node.value):
            lines[prefix + (str(i),)] = item.start_mark.line + 1
            lines.update(_key_lines(item, prefix + (str(i),)))
    return lines


#: A config file larger than this is refused unread (a full config is a few kB of text).
MAX_CONFIG_BYTES = 1 << 20
#: Most YAML nodes a config may stand for once its aliases are expanded; a full config has a few
#: hundred. Nested aliases can expand exponentially (nine levels of nine aliases: 9**9 nodes, the
#: "billion laughs"), so the bound is on the expanded count, checked while composing, before
#: anything is constructed.
MAX_YAML_NODES = 10_000
#: Deepest nesting of YAML collections a config may have (the deepest key needs five levels).
MAX_YAML_DEPTH = 32

_MERGE_TAG = "tag:yaml.org,2002:merge"


class _Refused(yaml.MarkedYAMLError):
    """A YAML document :class:`GuardedLoader` will not load; ``problem_mark`` has the line."""

    def __init__(self, problem: str, mark: yaml.Mark) -> None:
        super().__init__(problem=problem, problem_mark=mark)


class GuardedLoader(ConfigLoader):
    """The config loader (:class:`ConfigLoader`, YAML 1.2 floats) with bounds for hostile or mistyped configs.

    Refused, each at the line where it is found, while composing (before any Python object is
    built): a node whose alias expansion exceeds :data:`MAX_YAML_NODES`, an alias inside the node
    it names (a recursive alias), nesting deeper than :data:`MAX_YAML_DEPTH` and a key written
    twice in one mapping (merge keys ``<<`` may be overridden, as YAML's merge type intends).
    A scalar Python cannot convert (an integer of thousands of digits, a timestamp like
    ``2024-13-01``) is refused at its line while constructing.
    """

    def __init__(self, stream) -> None:
        super().__init__(stream)
        self._expanded: dict[int, int] = {}  # id(node) -> nodes it stands for, aliases expanded
        self._open_anchors: set[str] = set()  # anchors whose node is still being composed
        self._depth = 0

    def compose_node(self, parent, index):
        event = self.peek_event()
        if isinstance(event, yaml.AliasEvent):
            if event.anchor in self._open_anchors:
                raise _Refused(f"alias *{event.anchor} lies inside the node it names "
                               f"(a recursive alias)", event.start_mark)
            return super().compose_node(parent, index)
        self._depth += 1
        if self._depth > MAX_YAML_DEPTH:
            raise _Refused(f"nested deeper than {MAX_YAML_DEPTH} levels", event.start_mark)
        anchor = event.anchor
        if anchor is not None:
            self._open_anchors.add(anchor)
        try:
            node = super().compose_node(parent, index)
        finally:
            self._depth -= 1
            self._open_anchors.discard(anchor)
        if isinstance(node, yaml.MappingNode):
            children = [n for pair in node.value for n in pair]
        elif isinstance(node, yaml.SequenceNode):
            children = node.value
        else:
            children = []
        size = 1 + sum(self._expanded[id(c)] for c in children)
        if size > MAX_YAML_NODES:
            raise _Refused(f"aliases expand this node to more than {MAX_YAML_NODES} values "
                           f"(a config needs a few hundred)", node.start_mark)
        self._expanded[id(node)] = size
        return node

    def compose_mapping_node(self, anchor):
        node = super().compose_mapping_node(anchor)
        seen: dict[tuple, yaml.Node] = {}
        for key_node, _value in node.value:
            if not isinstance(key_node, yaml.ScalarNode) or key_node.tag == _MERGE_TAG:
                continue
            key = (key_node.tag, key_node.value)
            if key in seen:
                first = seen[key].start_mark.line + 1
                raise _Refused(f"duplicate key {key_node.value!r} (first on line {first})",
                               key_node.start_mark)
            seen[key] = key_node
        return node

    def construct_object(self, node, deep=False):
        try:
            return super().construct_object(node, deep=deep)
        except (ValueError, OverflowError) as exc:
            raise _Refused(f"cannot read {node.value[:40]!r}...: {exc}"
                           if isinstance(node.value, str) and len(node.value) > 40
                           else f"cannot read {node.value!r}: {exc}", node.start_mark) from None


def _load_guarded(text: str) -> tuple[Any, dict[tuple, int]]:
    """Compose ``text`` with :class:`GuardedLoader`, take its key lines, then construct it."""
    loader = GuardedLoader(text)
    try:
        node = loader.get_single_node()
        if node is None:
            return None, {}
        lines = _key_lines(node)  # before construction flattens merge keys into their mappings
        return loader.construct_document(node), lines
    finally:
        loader.dispose()


def read_yaml(path: str | Path) -> tuple[dict, dict[tuple, int]]:
    """Read a YAML mapping from ``path``; return it with a key-path -> line table.

    The file is read with :class:`GuardedLoader` (bounded alias expansion and nesting, no
    duplicate keys).

    Raises
    ------
    ConfigError
        Missing file, a directory, a file over :data:`MAX_CONFIG_BYTES`, unreadable text, a YAML
        syntax error or a refusal of :class:`GuardedLoader` (with its line), or a top level that
        is not a mapping.
    """
    p = Path(path)
    try:
        with open(p, "rb") as f:  # bounded: a device or a huge file is not a config
            blob = f.read(MAX_CONFIG_BYTES + 1)
        if len(blob) > MAX_CONFIG_BYTES:
            raise ConfigError(f"{p}: too large for a config file (more than "
                              f"{MAX_CONFIG_BYTES} bytes)")
        text = blob.decode("utf-8")
    except FileNotFoundError:
        raise ConfigError(f"{p}: no such config file") from None
    except IsADirectoryError:
        raise ConfigError(f"{p}: is a directory, not a config file") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(f"{p}: cannot read config: {exc}") from exc
    try:
        data, lines = _load_guarded(text)
    except _Refused as exc:
        raise ConfigError(f"{p} line {exc.problem_mark.line + 1}: {exc.problem}") from None
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        line = f" line {mark.line + 1}" if mark is not None else ""
        problem = " ".join(str(exc.problem or exc).split())
        raise ConfigError(f"{p}{line}: YAML syntax error: {problem}") from exc
    except yaml.reader.ReaderError as exc:  # a character YAML does not allow
        line = text.count("\n", 0, exc.position) + 1
        raise ConfigError(f"{p} line {line}: YAML error: character #x{exc.character:04x} "
                          f"is not allowed") from exc
    except yaml.YAMLError as exc:
        raise ConfigError(f"{p}: YAML error: {' '.join(str(exc).split())}") from exc
    if data is None:
        data = {}
    if not isinstance(data, dict):
        raise ConfigError(f"{p}: top level must be a mapping of sections, got "
                          f"{type(data).__name__}")
    return data, lines


def _at(where: str, lines: dict[tuple, int | str], loc: tuple) -> str:
    """``where`` plus the line of the deepest key of ``loc`` that exists in the file.

    A key set by an override (:func:`apply_overrides`) has the override's text in ``lines``
    instead of a line number; the place is then that text (``--set loading.gap_db=x``).
    """
    for n in range(len(loc), 0, -1):
        line = lines.get(loc[:n])
        if isinstance(line, str):
            return line
        if line is not None:
            return f"{where} line {line}"
    # a section an override made on its way to its key (--set nope.tau_s=1 makes nope)
    made = [text for key, text in lines.items()
            if isinstance(text, str) and loc and key[:len(loc)] == loc]
    return made[0] if made else where


def _explain(exc: ValidationError, where: str, lines: dict[tuple, int | str],
             prefix: tuple = ()) -> ConfigError:
    err = exc.errors()[0]
    loc = prefix + tuple(str(x) for x in err["loc"])
    problem = (err.get("ctx") or {}).get("error")
    if isinstance(problem, KeyProblem):  # a model-level check that knows its key
        loc = loc + problem.loc
        at = _at(where, lines, loc)
        return ConfigError(f"{at}: {'.'.join(loc)}={problem.value!r}: {problem.msg}")
    key = ".".join(loc) if loc else "(top level)"
    at = _at(where, lines, loc)
    msg = err["msg"].removeprefix("Value error, ")
    if err["type"] == "extra_forbidden":
        return ConfigError(f"{at}: unknown key {key}")
    if err["type"] == "missing":
        return ConfigError(f"{at}: missing key {key}")
    return ConfigError(f"{at}: {key}={err.get('input')!r}: {msg}")


def parse_section(model: type[Section], data: Any, *, where: str, name: str,
                  lines: dict[tuple, int] | None = None) -> Section:
    """Validate one section's mapping into ``model``; errors name ``name.key``."""
    if data is None:
        data = {}
    if not isinstance(data, dict):
        raise ConfigError(f"{where}: {name} must be a mapping, got {type(data).__name__}")
    try:
        return model.model_validate(data)
    except ValidationError as exc:
        raise _explain(exc, where, lines or {}, (name,)) from None


def load_config(path: str | Path | None, *, overrides: Any = ()) -> Config:
    """Read and validate a daemon config file, with optional overrides of single keys.

    Parameters
    ----------
    path : str or Path or None
        YAML file with the sections of :class:`Config`; None: every key at its default.
    overrides : sequence of str, or mapping
        ``"KEY=VALUE"`` strings or ``{KEY: value}`` (see :func:`apply_overrides`), applied to
        the file's mapping before validation, so the config's own checks judge them.

    Returns
    -------
    Config
        Frozen, validated configuration.

    Raises
    ------
    ConfigError
        One line naming the file, line, key path and value of the first problem; for a key
        set by an override, the override (``--set KEY=VALUE``) instead of the line.

    Notes
    -----
    Relative file paths (also those given by an override) are taken relative to the config
    file's folder, or to the working folder when ``path`` is None.
    """
    if path is None:
        data, lines, where, base = {}, {}, "defaults", Path(".")
    else:
        data, lines = read_yaml(path)
        where, base = str(path), Path(path).parent
    data, lines = apply_overrides(data, overrides, lines)
    try:
        config = Config.model_validate(data)
    except ValidationError as exc:
        raise _explain(exc, where, lines) from None
    return _resolve_paths(config, base)


_KEY_PART = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$|^[0-9]+$")


def parse_override(text: str) -> tuple[tuple[str, ...], Any]:
    """Split ``"KEY=VALUE"`` into the dotted key's path and the value read as YAML.

    The value is read with :class:`GuardedLoader` (YAML 1.2 floats: ``1e-6`` is a number;
    ``[0, 2, 4]`` a list; ``null`` None; ``.inf`` infinity); an empty value is None.

    Raises
    ------
    ConfigError
        No ``=``, an empty or malformed key (``--set KEY=VALUE`` named), or a value YAML
        cannot read.
    """
    key, eq, value = str(text).partition("=")
    key = key.strip()
    parts = tuple(key.split("."))
    if not eq or not key or not all(_KEY_PART.match(p) for p in parts):
        raise ConfigError(f"--set {text!r}: expected KEY=VALUE with KEY a dotted config key "
                          f"such as estimator.tau_s=0.5")
    try:
        parsed, _lines = _load_guarded(value) if value.strip() else (None, {})
    except yaml.YAMLError as exc:
        problem = " ".join(str(getattr(exc, "problem", None) or exc).split())
        raise ConfigError(f"--set {key}={value}: value is not valid YAML: {problem}") from None
    return parts, parsed


def apply_overrides(data: dict, overrides: Any,
                    lines: dict[tuple, int | str] | None = None
                    ) -> tuple[dict, dict[tuple, int | str]]:
    """A copy of a config's YAML mapping with single keys replaced, before validation.

    Parameters
    ----------
    data : dict
        The mapping read from a config file (not changed).
    overrides : sequence of str, or mapping
        ``"KEY=VALUE"`` strings (:func:`parse_override`) or a mapping of dotted key to an
        already-typed value. A missing section on the way is created (``driver.iq.path=x``
        with no ``iq:`` section); later overrides win.
    lines : dict, optional
        The file's key-path -> line table (:func:`read_yaml`).

    Returns
    -------
    data : dict
        The new mapping.
    lines : dict
        The line table with each overridden key (and everything below it) mapped to the
        override's text, so a validation error names ``--set KEY=VALUE`` instead of a line.

    Raises
    ------
    ConfigError
        A malformed override, or a key whose parent is not a section (``loading.bits.x=1``).
    """
    out = _copy_tree(data)
    lines = {} if lines is None else dict(lines)
    if isinstance(overrides, dict):
        items = [(tuple(str(k).split(".")), v, f"{k}={v!r}") for k, v in overrides.items()]
    else:
        items = []
        for text in overrides or ():
            parts, value = parse_override(text)
            items.append((parts, value, str(text)))
    for parts, value, text in items:
        node = out
        for depth, part in enumerate(parts[:-1]):
            child = node.get(part)
            if child is None:
                child = node[part] = {}
            elif not isinstance(child, dict):
                raise ConfigError(f"--set {text}: {'.'.join(parts[:depth + 1])} is not a "
                                  f"section, so it has no key {parts[depth + 1]!r}")
            node = child
        node[parts[-1]] = _copy_tree(value)
        for loc in [k for k in lines if k[:len(parts)] == parts]:
            del lines[loc]
        lines[parts] = f"--set {text}"
    return out, lines


def _copy_tree(value: Any) -> Any:
    """A copy of nested dicts and lists (leaves shared: YAML gives immutable scalars)."""
    if isinstance(value, dict):
        return {k: _copy_tree(v) for k, v in value.items()}
    if isinstance(value, list):
        return [_copy_tree(v) for v in value]
    return value


def config_with(config: Config, overrides: Any) -> Config:
    """``config`` with single keys overridden, validated again as a whole.

    Parameters
    ----------
    config : Config
        A validated configuration (its paths already resolved).
    overrides : sequence of str, or mapping
        As for :func:`apply_overrides`; relative paths given here stay as written.

    Raises
    ------
    ConfigError
        As :func:`load_config` does, naming the override.
    """
    if not overrides:
        return config
    data, lines = apply_overrides(config.model_dump(), overrides)
    try:
        return Config.model_validate(data)
    except ValidationError as exc:
        raise _explain(exc, "config", lines) from None


def _resolve_paths(config: Config, base: Path) -> Config:
    """Make every relative file path in the config relative to the config file's folder (a
    leading ``~`` is the home folder)."""

    def rebase(value: str | None) -> str | None:
        if value is None:
            return value
        value = os.path.expanduser(value)  # ~ and ~user: a home folder
        if Path(value).is_absolute():
            return value
        return str(base / value)

    def section(model: Section, *keys: str) -> Section:
        return model.model_copy(update={k: rebase(getattr(model, k)) for k in keys})

    driver = config.driver
    update = {}
    if driver.replay is not None:
        update["replay"] = section(driver.replay, "path")
    if driver.iq is not None:
        update["iq"] = section(driver.iq, "path")
    if update:
        driver = driver.model_copy(update=update)
    return config.model_copy(update={
        "driver": driver,
        "service": section(config.service, "state_path"),
        "record": section(config.record, "path").model_copy(
            update={"iq": section(config.record.iq, "path")}),
        "tx": section(config.tx, "path", "curve_daemon_key", "curve_own_key"),
        "publish": section(config.publish, "curve_secret_key", "curve_clients_dir"),
    })
