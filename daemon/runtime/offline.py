"""Offline runs: a recording through the link controller, no sockets, as fast as it goes.

:func:`replay_offline` feeds every estimate of a recording to the same
:class:`~brimline.daemon.core.controller.LinkController` the daemon runs (built from the config
by :mod:`brimline.daemon.runtime.assemble`), on the estimates' own ``time_s``, and returns one
frozen :class:`OfflineResult`: the maps, the decisions, a per-frame timeline and the summary
figures. It is the engine of ``brimline replay`` (and its what-if comparison), ``brimline
report`` and the sweep tasks; a sweep calls it in worker processes, so its arguments and its
result are plain picklable values.

Stable call (other modules and tools rely on it; add keyword arguments, never reorder)::

    replay_offline(config, recording_path, *, overrides=None, window=None, on_progress=None,
                   speed=None, keep_snr=False, on_step=None) -> OfflineResult

Inputs
------
``recording_path`` is an estimate recording (:mod:`brimline.daemon.wire.recording`, read with
its rotated parts by :class:`~brimline.drivers.sources.replay.ReplayDriver`) or a SigMF IQ
capture (``NAME``, ``NAME.sigmf-meta`` or ``NAME.sigmf-data``, through the receiver by
:class:`~brimline.drivers.sources.iq.IqDriver` with the config's ``driver.iq`` settings other
than its path). The config's tone plan must be the recording's; estimates of another plan are
rejected (``other_plan``), as the daemon does.

Determinism
-----------
Time is the estimates' ``time_s`` (the daemon's ``source`` clock), never a wall clock; the
epoch is derived from the recording (:func:`~brimline.daemon.wire.recording.recording_epoch`
for an estimate recording, a hash of the SigMF meta file for a capture); no state file is read.
The same recording, config and overrides therefore give the same maps byte for byte once
encoded, however fast the run goes (``speed`` only paces it). A silent stretch of the recording
gives the fallback map dated when a live daemon would have sent it (the controller's rule).

Figures
-------
Per frame the timeline keeps the step's kind, reason and cause (the rule behind it, as the
daemon's logs carry it), the rate of the map in force (bits per
OFDM symbol; ``rate_bps`` = bits times ``sample_rate_hz / (fft_size + cp_len)``, the status
message's formula), the map's own margin (``LoadMap.margin_db``) and the *live margin*: the
smallest per-tone margin of the map in force under the tracked SNR (``Tracked.snr_db``,
:meth:`Loader.tone_margin_db`), relative to the loading gap, which already includes
``loading.margin_db``. A live margin below 0 dB means the link runs below its target margin;
``time_below_target_s`` adds up the frame intervals where it does. Estimates carry no payload
error counts yet, so goodput is ``None`` ("not recorded"); header CRC failures are counted.

Speed
-----
An unpaced run of a whole estimate recording decodes :data:`DECODE_BLOCK` estimates ahead and
then steps the controller through them (:func:`_in_blocks`); the live margin is worked out a
run of frames under one map at a time (:class:`_LiveMargins`); the progress total comes from
:func:`~brimline.daemon.wire.recording.count_records` (record lengths and topics, no second
decode). None of it changes a figure: the replay digests (``tests/test_offline_digest.py``)
pin the results.
"""

from __future__ import annotations

import hashlib
import itertools
import math
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Iterator, Mapping, Sequence

import numpy as np
import zmq

from brimline.daemon.core.controller import Change, LinkController, Step
from brimline.daemon.errors import InputError, RecordingError, SourceError
from brimline.daemon.net.publisher import MapPublisher, StatusPublisher
from brimline.daemon.records import Estimate, LoadMap
from brimline.daemon.runtime.assemble import build_controller, build_core
from brimline.daemon.runtime.config import Config, config_with, load_config
from brimline.daemon.runtime.status import build_status, controller_fields, frame_fields
from brimline.daemon.wire.codec import TOPIC_ESTIMATE
from brimline.daemon.wire.export import ExportTables
from brimline.daemon.wire.recording import count_records, recording_epoch
from brimline.drivers.link.frame import make_plan
from brimline.drivers.sources.iq import IqDriver
from brimline.drivers.sources.replay import ReplayDriver

__all__ = ["Window", "MapEvent", "Timeline", "OfflineSummary", "OfflineResult", "Divergence",
           "Comparison", "replay_offline", "compare_results", "recording_kind", "source_epoch",
           "result_tables", "result_lines", "ReplayPublisher"]

_SIGMF_SUFFIXES = (".sigmf-meta", ".sigmf-data")

#: Estimates of a recording decoded ahead at a time when a replay runs as fast as it can (see
#: :func:`_in_blocks`).
DECODE_BLOCK = 64


@dataclass(frozen=True)
class Window:
    """Which estimates of a recording are replayed (all bounds optional, inclusive at start).

    Attributes
    ----------
    start_s, stop_s : float or None
        Estimates with ``start_s <= time_s < stop_s``.
    first_frame, last_frame : int or None
        Estimates with ``first_frame <= frame <= last_frame``.
    """

    start_s: float | None = None
    stop_s: float | None = None
    first_frame: int | None = None
    last_frame: int | None = None

    def __post_init__(self) -> None:
        for name in ("start_s", "stop_s"):
            v = getattr(self, name)
            if v is not None and not math.isfinite(float(v)):
                raise InputError(f"window {name}={v} must be a finite time in seconds")
        if (self.start_s is not None and self.stop_s is not None
                and not self.stop_s > self.start_s):
            raise InputError(f"window stop_s={self.stop_s} must be after start_s={self.start_s}")
        if (self.first_frame is not None and self.last_frame is not None
                and self.last_frame < self.first_frame):
            raise InputError(f"window last_frame={self.last_frame} must be >= first_frame="
                             f"{self.first_frame}")

    def admits(self, est: Estimate) -> bool:
        """Whether ``est`` lies inside the window."""
        return ((self.start_s is None or est.time_s >= self.start_s)
                and (self.stop_s is None or est.time_s < self.stop_s)
                and (self.first_frame is None or est.frame >= self.first_frame)
                and (self.last_frame is None or est.frame <= self.last_frame))

    def past(self, est: Estimate) -> bool:
        """Whether ``est`` and (recordings being in time order) everything after it is beyond."""
        return ((self.stop_s is not None and est.time_s >= self.stop_s)
                or (self.last_frame is not None and est.frame > self.last_frame))


@dataclass(frozen=True)
class MapEvent:
    """One published map: where in the recording it was made, and why.

    Attributes
    ----------
    index : int
        Position of the step in the timeline (0 = first replayed estimate).
    frame : int
        Frame number of the estimate that caused it.
    time_s : float
        Controller time of the map (``LoadMap.created_s``), s.
    kind : str
        Decision kind (bit_swap, reload, emergency, fallback).
    reason : str
        Change control's reason.
    seq : int
        Map sequence number.
    """

    index: int
    frame: int
    time_s: float
    kind: str
    reason: str
    seq: int


@dataclass(frozen=True)
class Timeline:
    """Per replayed estimate: what the controller did and the link's state after it.

    All arrays have one entry per estimate fed to the controller, in order.

    Attributes
    ----------
    frame : ndarray of int64
    time_s : ndarray of float64
        The estimate's time, s.
    kind : tuple of str
        Step kind: ``keep``, ``rejected``, or a map's decision kind.
    reason : tuple of str
        Step reason (a rejection's counter name, change control's words).
    bits_per_symbol : ndarray of int64
        Total bits of the map in force after the step (0 before the first map).
    margin_db : ndarray of float64
        ``LoadMap.margin_db`` of the map in force (NaN before the first map or for fallback).
    live_margin_db : ndarray of float64
        Smallest per-tone margin of the map in force under the tracked SNR, relative to the
        loading gap (NaN when unknown); see the module docstring.
    seq : ndarray of int64
        Sequence number of the map in force (-1 before the first).
    fallback : ndarray of bool
        The map in force is the fallback map.
    cause : tuple of str
        The rule behind each step (:attr:`~brimline.daemon.core.controller.Step.cause`:
        change control's ``Decision.cause``, a rejection's counter name); empty for a
        timeline made without causes.
    """

    frame: np.ndarray
    time_s: np.ndarray
    kind: tuple[str, ...]
    reason: tuple[str, ...]
    bits_per_symbol: np.ndarray
    margin_db: np.ndarray
    live_margin_db: np.ndarray
    seq: np.ndarray
    fallback: np.ndarray
    cause: tuple[str, ...] = ()

    def __len__(self) -> int:
        return int(self.frame.size)


@dataclass(frozen=True)
class OfflineSummary:
    """The end-of-replay figures (plain values; ``None`` where a figure is undefined).

    Attributes
    ----------
    frames : int
        Estimates fed to the controller.
    accepted : int
        Estimates the estimator used.
    rejected : dict
        Rejected estimates by reason.
    source_counters : dict
        The source's counters (``torn``, ``damaged``, ``no_sync``, ...).
    header_errors : int
        Estimates whose frame header failed its CRC.
    duration_s : float
        Time from the first to the last replayed estimate, s.
    maps_by_kind : dict
        Maps published by decision kind.
    maps : int
        Maps published.
    changes_per_min : float or None
        Maps per minute of recording time (None for a run shorter than 1 s: too short to
        say).
    rate_mean_bits, rate_min_bits, rate_max_bits : float or None
        Bits per OFDM symbol of the map in force, over the frames that had one.
    rate_mean_bps : float or None
        ``rate_mean_bits`` times the OFDM symbol rate, bit/s.
    margin_mean_db, margin_min_db : float or None
        The map in force's own margin (finite values only), dB.
    live_margin_mean_db, live_margin_min_db : float or None
        The live margin (module docstring), dB.
    time_below_target_s : float
        Recording time with a live margin below 0 dB (below the target margin), s.
    goodput_bps : float or None
        Payload bits delivered per second where the recording says; None: not recorded.
    """

    frames: int
    accepted: int
    rejected: dict
    source_counters: dict
    header_errors: int
    duration_s: float
    maps_by_kind: dict
    maps: int
    changes_per_min: float | None
    rate_mean_bits: float | None
    rate_min_bits: float | None
    rate_max_bits: float | None
    rate_mean_bps: float | None
    margin_mean_db: float | None
    margin_min_db: float | None
    live_margin_mean_db: float | None
    live_margin_min_db: float | None
    time_below_target_s: float
    goodput_bps: float | None = None

    def as_dict(self) -> dict[str, Any]:
        """The summary as a JSON-safe dict (same keys)."""
        return {k: (dict(v) if isinstance(v, dict) else v) for k, v in self.__dict__.items()}


@dataclass(frozen=True)
class OfflineResult:
    """Everything one offline run produced.

    Attributes
    ----------
    source : str
        The recording's path as given.
    source_kind : str
        ``"estimates"`` (an estimate recording) or ``"iq"`` (a SigMF capture).
    epoch : str
        The epoch every map carries (derived from the recording).
    settings : tuple of str
        The overrides applied, as ``KEY=VALUE`` text, in order.
    plan_id : str
        Tone plan id of the config.
    tone_index : ndarray of int16
        The plan's data tones (signed FFT bins).
    symbol_rate_hz : float
        OFDM symbols per second (``sample_rate_hz / (fft_size + cp_len)``).
    maps : tuple of LoadMap
        Every map published, in order.
    events : tuple of MapEvent
        One per map, same order.
    timeline : Timeline
        Per replayed estimate.
    summary : OfflineSummary
        End figures.
    snr_db : ndarray of float32 or None
        The estimates' per-tone SNR, (frames, tones), with ``keep_snr=True``; else None.
    changes : tuple of Change
        The controller's record of each map (:class:`~brimline.daemon.core.controller.Change`:
        cause, bits before and after), same order as ``maps``.
    """

    source: str
    source_kind: str
    epoch: str
    settings: tuple[str, ...]
    plan_id: str
    tone_index: np.ndarray
    symbol_rate_hz: float
    maps: tuple[LoadMap, ...]
    events: tuple[MapEvent, ...]
    timeline: Timeline
    summary: OfflineSummary
    snr_db: np.ndarray | None = field(default=None, repr=False)
    changes: tuple[Change, ...] = ()


def recording_kind(path: str | Path) -> str:
    """``"iq"`` for a SigMF capture (``NAME.sigmf-meta``/``-data``, or ``NAME`` beside
    them), else ``"estimates"``."""
    p = Path(path)
    if p.name.endswith(_SIGMF_SUFFIXES):
        return "iq"
    if not p.exists() and Path(str(p) + ".sigmf-meta").exists():
        return "iq"
    return "estimates"


def _settings_text(overrides: Any) -> tuple[str, ...]:
    if not overrides:
        return ()
    if isinstance(overrides, Mapping):
        return tuple(f"{k}={v}" for k, v in overrides.items())
    return tuple(str(o) for o in overrides)


def _resolve_config(config: Config | str | Path | None, overrides: Any) -> Config:
    if config is None or isinstance(config, (str, Path)):
        return load_config(config, overrides=overrides or ())
    return config_with(config, overrides)


def _sigmf_epoch(path: Path) -> str:
    name = str(path)
    for suffix in _SIGMF_SUFFIXES:
        if name.endswith(suffix):
            name = name[:-len(suffix)]
    meta = Path(name + ".sigmf-meta")
    try:
        blob = meta.read_bytes()
    except OSError as exc:
        raise SourceError(f"{meta}: cannot read: {exc.strerror or exc}") from None
    return hashlib.sha256(blob).hexdigest()[:16]


def source_epoch(path: str | Path) -> str:
    """The epoch an offline run of ``path`` gives its maps (16 hex digits, from the recording).

    Raises
    ------
    SourceError
        When the recording cannot be read.
    """
    p = Path(path)
    if recording_kind(p) == "iq":
        return _sigmf_epoch(p)
    try:
        return recording_epoch(p)
    except RecordingError as exc:
        raise SourceError(f"replay: {exc}") from None


def _open_source(config: Config, plan, path: Path):
    """The driver for ``path``, its kind and the epoch its maps carry."""
    kind = recording_kind(path)
    if kind == "iq":
        settings = config.driver.iq.model_dump() if config.driver.iq is not None else {}
        settings.update(path=str(path), realtime=False)
        return IqDriver(plan=plan, **settings), kind, _sigmf_epoch(path)
    driver = ReplayDriver(path=path)
    try:
        epoch = source_epoch(path)
    except SourceError:
        driver.close()
        raise
    return driver, kind, epoch


def _count_estimates(path: Path, kind: str) -> int | None:
    """How many estimates a run will see, for progress (None for IQ: not known before)."""
    if kind == "iq":
        return None
    return count_records(path, TOPIC_ESTIMATE)


def _in_blocks(items: Iterator, size: int) -> Iterator:
    """``items`` as they come, drawn ``size`` at a time.

    An unpaced replay decodes a block of estimates, then decides on them one after the other:
    the decoder and the controller each run on with their own code and data still in the CPU's
    caches, where frame by frame each pushed the other's out. Same estimates, same order; the
    source has only read further ahead when a step runs (5 to 13 % less CPU time per frame
    without channel prediction, blocks of 1 and 64 timed alternately on the 200-tone bench
    recording on a shared box).
    """
    while True:
        block = list(itertools.islice(items, size))
        if not block:
            return
        yield from block


class _Pacer:
    """Waits so that estimates go out ``speed`` times as fast as their recorded times."""

    def __init__(self, speed: float, sleep: Callable[[float], None],
                 clock: Callable[[], float]) -> None:
        if not (math.isfinite(speed) and speed > 0):
            raise InputError(f"--speed={speed} must be a positive number")
        self.speed, self._sleep, self._clock = float(speed), sleep, clock
        self._t0: float | None = None
        self._wall0 = 0.0

    def wait(self, time_s: float) -> None:
        if self._t0 is None:
            self._t0, self._wall0 = time_s, self._clock()
            return
        delay = (time_s - self._t0) / self.speed - (self._clock() - self._wall0)
        if delay > 0:
            self._sleep(delay)


def replay_offline(config: Config | str | Path | None, recording_path: str | Path, *,
                   overrides: Sequence[str] | Mapping[str, Any] | None = None,
                   window: Window | None = None,
                   on_progress: Callable[[int, int | None], None] | None = None,
                   speed: float | None = None, keep_snr: bool = False,
                   on_step: Callable[[Step, Estimate, LinkController], None] | None = None,
                   sleep: Callable[[float], None] = time.sleep,
                   clock: Callable[[], float] = time.monotonic) -> OfflineResult:
    """Run a recording through the link controller a config describes; no sockets.

    Parameters
    ----------
    config : Config, str, Path or None
        A validated config, the path of a config file, or None for every key at its default.
    recording_path : str or Path
        Estimate recording or SigMF IQ capture (see the module docstring).
    overrides : sequence of str or mapping, optional
        ``"KEY=VALUE"`` strings or ``{KEY: value}`` applied to the config before validation
        (:func:`brimline.daemon.runtime.config.apply_overrides`).
    window : Window, optional
        Replay only these estimates (the others are not fed to the controller).
    on_progress : callable, optional
        ``on_progress(done, total)`` after each estimate read (total None when unknown).
    speed : float, optional
        Pace the estimates at ``speed`` times their recorded rate; None: as fast as possible.
    keep_snr : bool
        Keep every replayed estimate's per-tone SNR (``OfflineResult.snr_db``).
    on_step : callable, optional
        ``on_step(step, estimate, controller)`` after each controller step (publishing).
    sleep, clock : callable
        Pacing's sleep and monotonic clock (tests inject fakes).

    Returns
    -------
    OfflineResult

    Raises
    ------
    ConfigError
        The config or an override is wrong (one line naming the key and value).
    SourceError
        The recording cannot be opened or read.
    InputError
        A bad window or speed.
    """
    cfg = _resolve_config(config, overrides)
    path = Path(recording_path)
    if not path.exists() and recording_kind(path) != "iq":
        raise SourceError(f"{path}: no such recording")
    plan, loader, estimator, change = build_core(cfg)
    window = window or Window()
    windowed = window != Window()
    pacer = None if speed is None else _Pacer(speed, sleep, clock)
    driver, kind, epoch = _open_source(cfg, plan, path)
    controller = build_controller(cfg, plan, loader, estimator, change, epoch=epoch)
    total = _count_estimates(path, kind) if on_progress is not None else None

    frames, times, kinds, reasons, causes = [], [], [], [], []
    rate, margin, seqs, fb = [], [], [], []
    live = _LiveMargins(loader)
    snr_rows: list[np.ndarray] = []
    maps: list[LoadMap] = []
    events: list[MapEvent] = []
    changes: list[Change] = []
    header_errors = 0
    done = 0
    decide = controller.on_estimate
    # The map in force and what each frame under it records (bits, margin, seq, fallback).
    in_force: LoadMap | None = None
    map_row: tuple = (0, math.nan, -1, False)
    with driver:
        estimates = driver.frames()
        if kind == "estimates" and pacer is None and not windowed:
            # Nothing waits on a single estimate and nothing stops the read early (a window
            # would, and the driver would count the estimates read past it).
            estimates = _in_blocks(estimates, DECODE_BLOCK)
        for est in estimates:
            done += 1
            if on_progress is not None:
                on_progress(done, total)
            if windowed and not window.admits(est):
                if window.past(est):
                    break
                continue
            if pacer is not None:
                pacer.wait(est.time_s)
            step = decide(est, est.time_s)
            if step.maps:
                index = len(frames)
                for m, ch in zip(step.maps, step.changes):
                    maps.append(m)
                    changes.append(ch)
                    events.append(MapEvent(index, est.frame, ch.time_s, ch.kind, ch.reason,
                                           ch.seq))
            if on_step is not None:
                on_step(step, est, controller)
            if not est.header_ok:
                header_errors += 1
            cur = controller.current_map
            if cur is not in_force:
                in_force = cur
                map_row = (cur.total_bits, cur.margin_db, cur.seq, cur.fallback)
            frames.append(est.frame)
            times.append(est.time_s)
            kinds.append(step.kind)
            reasons.append(step.reason)
            causes.append(step.cause)
            rate.append(map_row[0])
            margin.append(map_row[1])
            seqs.append(map_row[2])
            fb.append(map_row[3])
            live.add(cur, controller.last_tracked)
            if keep_snr:
                snr_rows.append(est.snr_db)
        counters = dict(driver.counters)
    timeline = Timeline(
        frame=np.asarray(frames, dtype=np.int64), time_s=np.asarray(times, dtype=np.float64),
        kind=tuple(kinds), reason=tuple(reasons),
        bits_per_symbol=np.asarray(rate, dtype=np.int64),
        margin_db=np.asarray(margin, dtype=np.float64),
        live_margin_db=live.values(),
        seq=np.asarray(seqs, dtype=np.int64), fallback=np.asarray(fb, dtype=bool),
        cause=tuple(causes))
    symbol_rate_hz = plan.sample_rate_hz / plan.symbol_len
    summary = _summarise(timeline, controller, counters, header_errors, symbol_rate_hz)
    snr = None
    if keep_snr:
        snr = (np.vstack(snr_rows).astype(np.float32) if snr_rows
               else np.zeros((0, plan.data_tones.size), dtype=np.float32))
        snr.setflags(write=False)
    return OfflineResult(source=str(recording_path), source_kind=kind, epoch=epoch,
                         settings=_settings_text(overrides), plan_id=plan.plan_id,
                         tone_index=np.asarray(plan.data_tones), symbol_rate_hz=symbol_rate_hz,
                         maps=tuple(maps), events=tuple(events), timeline=timeline,
                         summary=summary, snr_db=snr, changes=tuple(changes))


def _margin_at_0db(loader, m: LoadMap) -> tuple[np.ndarray, np.ndarray] | None:
    """The loaded tones of map ``m`` and their margins at an SNR of 0 dB (the loader's rule,
    :meth:`Loader.tone_margin_db`): a tone's margin at SNR ``s`` dB is this plus ``s``, so a
    frame costs one addition and one minimum. None when nothing is loaded."""
    loaded = np.flatnonzero(m.bits > 0)
    if loaded.size == 0:
        return None
    at_0db = loader.tone_margin_db(m.bits[loaded], m.power_lin[loaded], np.ones(loaded.size))
    return loaded, at_0db


class _LiveMargins:
    """The live margin of every replayed frame (module docstring), worked out a run of frames
    at a time.

    Per frame only a reference to the tracked SNR is kept (``Tracked.snr_db``: a fresh
    read-only array per accepted estimate, never written again); a run of frames under one
    map, up to :attr:`BLOCK` frames, is then one gather, one addition and one minimum per row
    for all of them. The figures are those of the per-frame rule (the same additions, the
    same minimum), only fewer numpy calls.
    """

    BLOCK = 256

    def __init__(self, loader) -> None:
        self._loader = loader
        self._values: list[float] = []
        self._map: LoadMap | None = None
        self._at_0db = None           # _margin_at_0db of self._map
        self._rows: list[np.ndarray] = []   # tracked SNR of the pending frames ...
        self._where: list[int] = []         # ... and their positions in _values

    def add(self, m: LoadMap | None, tracked) -> None:
        """One frame: the map in force after it (None before the first) and the tracked view."""
        if m is not self._map:
            self._flush()
            self._map = m
            self._at_0db = None if m is None else _margin_at_0db(self._loader, m)
        self._values.append(math.nan)
        if self._at_0db is None or tracked is None or tracked.plan_id != m.plan_id:
            return
        self._rows.append(tracked.snr_db)
        self._where.append(len(self._values) - 1)
        if len(self._rows) >= self.BLOCK:
            self._flush()

    def _flush(self) -> None:
        if not self._rows:
            return
        loaded, base = self._at_0db
        margins = np.vstack(self._rows)[:, loaded]
        margins += base
        for i, v in zip(self._where, margins.min(axis=1).tolist()):
            self._values[i] = v
        self._rows.clear()
        self._where.clear()

    def values(self) -> np.ndarray:
        """Every frame's live margin so far, dB (NaN when unknown)."""
        self._flush()
        return np.asarray(self._values, dtype=np.float64)


def _stat(values: np.ndarray, how) -> float | None:
    v = values[np.isfinite(values)]
    return float(how(v)) if v.size else None


def _summarise(tl: Timeline, c: LinkController, counters: dict, header_errors: int,
               symbol_rate_hz: float) -> OfflineSummary:
    n = len(tl)
    duration = float(tl.time_s[-1] - tl.time_s[0]) if n else 0.0
    maps = int(sum(c.maps_published.values()))
    with_map = tl.seq >= 0
    rates = tl.bits_per_symbol[with_map].astype(np.float64)
    # Each frame's state lasts until the next frame (the last one: the median interval).
    dt = np.diff(tl.time_s)
    if n:
        last = float(np.median(dt)) if dt.size else 0.0
        dt = np.append(dt, last)
    below = float(dt[np.nan_to_num(tl.live_margin_db, nan=0.0) < 0].sum()) if n else 0.0
    mean_bits = _stat(rates, np.mean)
    return OfflineSummary(
        frames=n, accepted=int(c.accepted), rejected=dict(sorted(c.rejected.items())),
        source_counters=dict(sorted(counters.items())), header_errors=int(header_errors),
        duration_s=duration, maps_by_kind=dict(sorted(c.maps_published.items())), maps=maps,
        changes_per_min=maps / (duration / 60.0) if duration >= 1.0 else None,
        rate_mean_bits=mean_bits, rate_min_bits=_stat(rates, np.min),
        rate_max_bits=_stat(rates, np.max),
        rate_mean_bps=None if mean_bits is None else mean_bits * symbol_rate_hz,
        margin_mean_db=_stat(tl.margin_db, np.mean), margin_min_db=_stat(tl.margin_db, np.min),
        live_margin_mean_db=_stat(tl.live_margin_db, np.mean),
        live_margin_min_db=_stat(tl.live_margin_db, np.min),
        time_below_target_s=below, goodput_bps=None)


# --------------------------------------------------------------------------- what-if


@dataclass(frozen=True)
class Divergence:
    """Where two runs of one recording first decided differently.

    Attributes
    ----------
    index : int
        Timeline position of the first differing step.
    frame : int
        Its estimate's frame number.
    time_s : float
        Its estimate's time, s.
    a_kind, a_reason, b_kind, b_reason : str
        What each run decided there.
    """

    index: int
    frame: int
    time_s: float
    a_kind: str
    a_reason: str
    b_kind: str
    b_reason: str


@dataclass(frozen=True)
class Comparison:
    """Two offline runs of one recording side by side.

    Attributes
    ----------
    a, b : OfflineResult
    divergence : Divergence or None
        The first step whose kind, reason or resulting map differs; None when the runs agree
        throughout (or replayed different estimates, see ``same_frames``).
    same_frames : bool
        Both runs replayed the same estimates (same frame numbers and times).
    """

    a: OfflineResult
    b: OfflineResult
    divergence: Divergence | None
    same_frames: bool


def compare_results(a: OfflineResult, b: OfflineResult) -> Comparison:
    """Find where two runs of one recording first decided differently.

    A step differs when its kind differs, or its reason for any kind but ``keep`` (whose
    reason only quotes figures), when the maps it published differ (kind,
    reason, bits or power of each, or their number: a step may publish a fallback map and a
    normal one), or when the rate or fallback state after it differs. Runs over different
    estimates are compared up to the shorter one.

    Parameters
    ----------
    a, b : OfflineResult
        Two runs (typically one recording under two settings).

    Returns
    -------
    Comparison
    """
    ta, tb = a.timeline, b.timeline
    n = min(len(ta), len(tb))
    same = (len(ta) == len(tb) and np.array_equal(ta.frame, tb.frame)
            and np.array_equal(ta.time_s, tb.time_s))
    differs = ((ta.bits_per_symbol[:n] != tb.bits_per_symbol[:n])
               | (ta.fallback[:n] != tb.fallback[:n])
               | (ta.frame[:n] != tb.frame[:n]))
    first = int(np.argmax(differs)) if differs.any() else n
    for i in range(first):
        # A keep's reason only reports figures (the worst margin seen): not a decision.
        if ta.kind[i] != tb.kind[i] or (ta.kind[i] != "keep" and ta.reason[i] != tb.reason[i]):
            first = i
            break
    pick: tuple[str, str, str, str] | None = None
    for k in range(max(len(a.events), len(b.events))):
        ea = a.events[k] if k < len(a.events) else None
        eb = b.events[k] if k < len(b.events) else None
        if ea is not None and eb is not None and _same_map(a, b, k):
            continue
        index = min(e.index for e in (ea, eb) if e is not None)
        if index < first or (index == first and pick is None):
            first = index
            none = ("-", "no map")
            pick = (*((ea.kind, ea.reason) if ea is not None and ea.index == index else none),
                    *((eb.kind, eb.reason) if eb is not None and eb.index == index else none))
        break
    div = None
    if first < n:
        kinds = pick or (ta.kind[first], ta.reason[first], tb.kind[first], tb.reason[first])
        div = Divergence(index=first, frame=int(ta.frame[first]),
                         time_s=float(ta.time_s[first]), a_kind=kinds[0], a_reason=kinds[1],
                         b_kind=kinds[2], b_reason=kinds[3])
    return Comparison(a=a, b=b, divergence=div, same_frames=same)


def _same_map(a: OfflineResult, b: OfflineResult, k: int) -> bool:
    """Whether the ``k``-th maps of two runs were made at the same step alike."""
    ea, eb, ma, mb = a.events[k], b.events[k], a.maps[k], b.maps[k]
    return (ea.index == eb.index and ea.kind == eb.kind and ea.reason == eb.reason
            and np.array_equal(ma.bits, mb.bits) and np.array_equal(ma.power_lin, mb.power_lin))


# --------------------------------------------------------------------------- outputs


def result_tables(result: OfflineResult) -> ExportTables:
    """The export tables of a run (:mod:`brimline.daemon.wire.export`)."""
    tl = result.timeline
    estimates = {"frame": tl.frame, "time_s": tl.time_s}
    if result.snr_db is not None:
        estimates["snr_db"] = result.snr_db
    n = result.tone_index.size
    maps = {
        "seq": [m.seq for m in result.maps], "frame": [e.frame for e in result.events],
        "time_s": [e.time_s for e in result.events], "kind": [e.kind for e in result.events],
        "cause": [(result.changes[k].cause if k < len(result.changes) else "")
                  for k in range(len(result.events))],
        "reason": [e.reason for e in result.events],
        "effective_frame": [m.effective_frame for m in result.maps],
        "total_bits": [m.total_bits for m in result.maps],
        "margin_db": [m.margin_db for m in result.maps],
        "gap_db": [m.gap_db for m in result.maps],
        "fallback": [m.fallback for m in result.maps],
        "bits": (np.vstack([m.bits for m in result.maps]) if result.maps
                 else np.zeros((0, n), np.uint8)),
        "power_lin": (np.vstack([m.power_lin for m in result.maps]) if result.maps
                      else np.zeros((0, n), np.float32)),
    }
    decisions = {"frame": tl.frame, "time_s": tl.time_s, "kind": list(tl.kind),
                 "cause": list(tl.cause) if tl.cause else [""] * len(tl),
                 "reason": list(tl.reason), "bits_per_symbol": tl.bits_per_symbol,
                 "margin_db": tl.margin_db, "live_margin_db": tl.live_margin_db, "seq": tl.seq,
                 "fallback": tl.fallback}
    return ExportTables(tone_index=result.tone_index, estimates=estimates, decisions=decisions,
                        maps=maps)


def result_lines(result: OfflineResult) -> Iterator[dict]:
    """The JSON Lines of a run: a ``run`` line, then in order a ``decision`` line for every
    step that was not a plain keep (rejections included) and a ``map`` line for every map,
    then a ``summary`` line. Nothing in them depends on the wall clock.

    Each decision and map line carries ``cause``, the rule behind it, as the daemon's logs do:
    a decision's is :attr:`Timeline.cause` (change control's ``Decision.cause``, or the
    rejection counter's name), a map's is its ``Change.cause`` (``fallback`` for the fallback
    map). It is ``""`` where the result does not hold it."""
    yield {"type": "run", "source": result.source, "source_kind": result.source_kind,
           "epoch": result.epoch, "plan_id": result.plan_id, "settings": list(result.settings),
           "tone_index": result.tone_index}
    tl = result.timeline
    by_index: dict[int, list[int]] = {}
    for k, e in enumerate(result.events):
        by_index.setdefault(e.index, []).append(k)
    for i in range(len(tl)):
        if tl.kind[i] == "keep" and i not in by_index:
            continue
        yield {"type": "decision", "frame": int(tl.frame[i]), "time_s": float(tl.time_s[i]),
               "kind": tl.kind[i], "cause": tl.cause[i] if tl.cause else "",
               "reason": tl.reason[i]}
        for k in by_index.get(i, ()):
            e, m = result.events[k], result.maps[k]
            cause = result.changes[k].cause if k < len(result.changes) else ""
            yield {"type": "map", "frame": e.frame, "time_s": e.time_s, "kind": e.kind,
                   "cause": cause, "reason": e.reason, "seq": m.seq, "epoch": m.epoch,
                   "effective_frame": m.effective_frame, "total_bits": m.total_bits,
                   "margin_db": m.margin_db, "gap_db": m.gap_db, "fallback": m.fallback,
                   "bits": m.bits, "power_lin": m.power_lin}
    yield {"type": "summary", **result.summary.as_dict()}


class ReplayPublisher:
    """Publishes an offline run on the daemon's sockets, so followers and ``brimline watch``
    can attach: maps, heartbeats and snapshots (``publish:``), status (``status:``).

    Pass :meth:`on_step` as ``replay_offline(..., on_step=...)`` and, for a paced run,
    :meth:`wait` as its ``sleep``. Runs on the caller's thread
    (the sockets stay on it). The epoch must be the run's (:func:`source_epoch`).

    Parameters
    ----------
    config : Config
        Validated configuration (its ``publish`` and ``status`` sections).
    epoch : str
        The run's epoch.
    context : zmq.Context, optional
        Context for the sockets; by default one is made and terminated at :meth:`close`.
    clock, sleep : callable
        Monotonic clock for heartbeats and the status period; sleep of :meth:`wait`.
    """

    def __init__(self, config: Config, epoch: str, *, context=None,
                 clock: Callable[[], float] = time.monotonic,
                 sleep: Callable[[float], None] = time.sleep) -> None:
        self._own = context is None
        self._sleep = sleep
        self._last_time_s = 0.0
        self._context = zmq.Context() if context is None else context
        self._clock = clock
        self._config = config
        self.plan = None
        self.maps = self.status = None
        self._closed = False
        self._controller: LinkController | None = None
        try:
            self.maps = MapPublisher(context=self._context, epoch=epoch,
                                     **config.publish.model_dump())
            self.status = StatusPublisher(context=self._context, curve=self.maps.curve,
                                          **config.status.model_dump())
        except BaseException:
            self.close()
            raise
        self.epoch = epoch
        self._target_margin_db = config.loading.margin_db
        # symbol rate and frame layout of the config's link plan (no frame rate: a recording
        # is replayed at its own pace, so the status gives no data rate)
        self._frame = frame_fields(make_plan(**config.link.model_dump()))

    def endpoints(self) -> dict[str, str]:
        """The bound endpoints (ports resolved)."""
        return {"maps": self.maps.map_endpoint, "snapshots": self.maps.snapshot_endpoint,
                "acks": self.maps.ack_endpoint, "status": self.status.endpoint}

    def on_step(self, step: Step, estimate: Estimate, controller: LinkController) -> None:
        """Send the step's maps; heartbeats, snapshot replies and status when due."""
        self._controller = controller
        for m in step.maps:
            self.maps.publish(m)
        self.service(estimate.time_s)

    def wait(self, seconds: float) -> None:
        """Pacing's sleep while publishing: heartbeats, snapshots and status go on during a
        long pause (a silent stretch of the recording), in slices of at most 50 ms."""
        end = self._clock() + max(0.0, float(seconds))
        while True:
            left = end - self._clock()
            if left <= 0:
                return
            self._sleep(min(left, 0.05))
            self.service(self._last_time_s)

    def service(self, time_s: float) -> None:
        """Heartbeat, answer snapshot requests, drain acks, status when due."""
        self._last_time_s = time_s
        wall = self._clock()
        self.maps.tick(wall)
        if self.maps.snapshot_socket is not None:
            self.maps.handle_snapshot()
        if self.maps.ack_socket is not None:
            self.maps.poll_acks()
        if self._controller is not None and self.status.due(wall):
            self.status.publish(self._status(time_s))

    def _status(self, time_s: float) -> dict:
        return build_status(time_s=time_s, epoch=self.epoch,
                            driver={"name": "replay", "state": "running", "error": None,
                                    "counters": {}},
                            target_margin_db=self._target_margin_db, **self._frame,
                            **controller_fields(self._controller, time_s))

    def close(self) -> None:
        """Close the sockets (and the context if made here). Idempotent."""
        if self._closed:
            return
        self._closed = True
        for obj in (self.status, self.maps):
            if obj is not None:
                obj.close()
        if self._own:
            self._context.term()

    def __enter__(self) -> "ReplayPublisher":
        return self

    def __exit__(self, *exc) -> None:
        self.close()
