"""Recorded IQ through the receiver DSP: SigMF reading and writing, and :class:`IqDriver`.

A SigMF recording is a JSON metadata file ``NAME.sigmf-meta`` next to the raw samples
``NAME.sigmf-data``. brimline reads and writes the core fields it needs (``core:datatype``,
``core:sample_rate``, ``core:version``, ``captures[].core:sample_start`` and
``core:frequency``, ``core:description``) with the standard library's json module; datatypes
``cf32_le`` (complex float32) and ``ci16_le`` (complex int16, full scale 32768 = 1.0, the scale
the SigMF library gives fixed-point data).

What :func:`read_sigmf` checks, and how it answers (one line naming the file and the field):

- errors (:class:`~brimline.daemon.errors.SourceError`): unreadable or non-JSON meta; ``global``
  not an object; ``core:version`` not a string or of another major version than 1; a datatype
  other than the two above; ``core:sample_rate`` not a positive finite number; more than one
  channel; ``captures`` not a list of objects; a capture's ``core:sample_start`` not a
  non-negative integer, or at or past the end of the data; a ``core:frequency`` that is not a
  finite number; header or trailing bytes (non-conforming datasets); a data file that is missing,
  a folder, empty, or not a whole number of samples; data whose values betray the other datatype
  (see below).
- warnings (``Recording.warnings``, logged by :class:`IqDriver` and under ``run --check``): no
  ``core:version``; a capture without ``core:sample_start`` or out of order; ``annotations`` that
  are not a list of objects; data shorter than its annotations (the SigMF library warns there too).

Datatype mix-ups: a file's size is checked to be a whole number of samples (8 bytes for cf32, 4
for ci16). float32 data labelled ci16 always passes that test (8 is a multiple of 4), so the
values are checked: read as int16 pairs, float32 samples put the float's upper half (sign,
exponent, top of the mantissa) in every Q value and its random lower half in every I value, so
Q stays inside a narrow band of magnitudes while I spreads over the whole range; no recording of
a real signal looks like that. int16 data labelled cf32 puts each Q value in a float's sign and
exponent, so every negative Q reads as a float of 1e10 to 1e38 or NaN: cf32 values that are not
finite or beyond 1e9 are refused. Both tests read the first 65536 samples only. Not detected:
int16 data whose Q values are all positive, labelled cf32 (it reads as tiny floats; the
receiver then finds no frames, which the run's ``no_sync`` counter shows), and ci16 data of
one byte order labelled the other (``_be`` types are not read at all).
"""

from __future__ import annotations

import json
import logging
import math
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Iterator

import numpy as np

from brimline.daemon.errors import ConfigError, SourceError
from brimline.daemon.records import Estimate, TonePlan
from brimline.drivers.link.frame import as_link_plan
from brimline.drivers.link.receiver import FrameScanner, Receiver
from brimline.drivers.sources.base import Driver

__all__ = ["IqDriver", "Recording", "read_sigmf", "write_sigmf", "CI16_FULL_SCALE"]

log = logging.getLogger("brimline.sources.iq")

#: ci16 integer value that stands for amplitude 1.0: 2**15, as the SigMF library scales
#: fixed-point samples (sigmf-python, sigmf/sigmffile.py, ``SigMFFile._read_datafile``:
#: ``data *= 2 ** -(component_size * 8 - 1)``); the largest positive value is 32767/32768.
CI16_FULL_SCALE = 32768.0
_CI16_MAX = 32767
_DTYPES = {"cf32_le": np.dtype("<c8"), "ci16_le": np.dtype("<i2")}
_SAMPLE_BYTES = {"cf32_le": 8, "ci16_le": 4}
SIGMF_VERSION = "1.0.0"
_PLAUSIBILITY_SAMPLES = 65536
#: Largest meta file read (a meta with thousands of annotations is a few MB).
_MAX_META_BYTES = 64 << 20
#: Largest |I| or |Q| accepted in cf32 data: far above full scale (1.0) and above any ADC's raw
#: counts (a 24-bit converter reaches 8.4e6); int16 pairs read as float32 reach 1e38.
_CF32_PLAUSIBLE_MAX = 1e9


def _paths(path: str | Path) -> tuple[Path, Path]:
    p = Path(path)
    if p.is_dir() or p.name in ("", ".", ".."):
        raise SourceError(f"{p}: is a folder; give a recording as NAME, NAME.sigmf-meta or "
                          f"NAME.sigmf-data")
    if p.suffix in (".sigmf-meta", ".sigmf-data"):
        p = p.with_suffix("")
    return p.with_name(p.name + ".sigmf-meta"), p.with_name(p.name + ".sigmf-data")


@dataclass(frozen=True)
class Recording:
    """A SigMF recording opened for reading.

    Attributes
    ----------
    meta_path, data_path : Path
        The two files.
    datatype : str
        ``cf32_le`` or ``ci16_le``.
    sample_rate_hz : float
        ``core:sample_rate``.
    center_hz : float
        ``core:frequency`` of the first capture (NaN when absent).
    n_samples : int
        Complex samples in the data file.
    raw : ndarray
        Memory map of the data file (complex64, or int16 pairs for ci16).
    warnings : tuple of str
        Problems where reading on is safe, one line each naming the file and the field.
    """

    meta_path: Path
    data_path: Path
    datatype: str
    sample_rate_hz: float
    center_hz: float
    n_samples: int
    raw: np.ndarray
    warnings: tuple[str, ...] = ()

    def samples(self, start: int, stop: int) -> np.ndarray:
        """Samples ``start:stop`` as complex64 (ci16 scaled so 32768 is 1.0)."""
        if self.datatype == "ci16_le":
            pairs = np.asarray(self.raw[2 * start:2 * stop], dtype=np.float32)
            return (pairs[0::2] + 1j * pairs[1::2]).astype(np.complex64) / CI16_FULL_SCALE
        return np.asarray(self.raw[start:stop], dtype=np.complex64)


def _is_int(v: Any) -> bool:
    return isinstance(v, int) and not isinstance(v, bool)


def _is_number(v: Any) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)


def _read_meta(meta_path: Path) -> dict:
    try:
        with open(meta_path, "rb") as f:  # bounded: a device or a huge file is not a meta file
            blob = f.read(_MAX_META_BYTES + 1)
        if len(blob) > _MAX_META_BYTES:
            raise SourceError(f"{meta_path}: larger than {_MAX_META_BYTES} bytes; not a SigMF "
                              f"metadata file")
        meta = json.loads(blob.decode("utf-8"))
    except FileNotFoundError:
        raise SourceError(f"{meta_path}: no such SigMF metadata file") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise SourceError(f"{meta_path}: cannot read: {exc}") from exc
    except json.JSONDecodeError as exc:
        raise SourceError(f"{meta_path} line {exc.lineno}: not valid JSON: {exc.msg}") from exc
    except ValueError as exc:  # an integer of thousands of digits
        raise SourceError(f"{meta_path}: not valid JSON: {exc}") from exc
    except RecursionError:  # JSON nested thousands deep
        raise SourceError(f"{meta_path}: JSON nested too deeply") from None
    if not isinstance(meta, dict) or not isinstance(meta.get("global"), dict):
        raise SourceError(f"{meta_path}: no 'global' object")
    return meta


def _check_global(meta_path: Path, glob: dict, warnings: list[str]) -> tuple[str, float]:
    """Version, datatype, sample rate and channels of the ``global`` object."""
    version = glob.get("core:version")
    if version is None:
        warnings.append(f"{meta_path}: global has no core:version (SigMF requires it); "
                        f"read as {SIGMF_VERSION}")
    elif not isinstance(version, str) or version.split(".")[0] != "1":
        raise SourceError(f"{meta_path}: core:version={version!r} must be a SigMF 1.x version "
                          f"string such as {SIGMF_VERSION!r}")
    datatype = glob.get("core:datatype")
    if datatype not in _DTYPES:
        raise SourceError(f"{meta_path}: core:datatype={datatype!r} is not one of "
                          f"{sorted(_DTYPES)}")
    rate = glob.get("core:sample_rate")
    if not (_is_number(rate) and rate > 0):
        raise SourceError(f"{meta_path}: core:sample_rate={rate!r} must be a positive number")
    channels = glob.get("core:num_channels", 1)
    if channels != 1 or not _is_int(channels):
        raise SourceError(f"{meta_path}: core:num_channels={channels!r}: only single-channel "
                          f"recordings are read")
    trailing = glob.get("core:trailing_bytes", 0)
    if trailing != 0:
        raise SourceError(f"{meta_path}: core:trailing_bytes={trailing!r}: non-conforming "
                          f"datasets are not read")
    return datatype, float(rate)


def _object_list(meta_path: Path, meta: dict, key: str) -> list[dict]:
    """``meta[key]`` as a list of objects (absent: empty); raises naming the key otherwise."""
    items = meta.get(key, [])
    if not isinstance(items, list):
        raise SourceError(f"{meta_path}: {key} must be a list of objects, got "
                          f"{type(items).__name__}")
    for i, item in enumerate(items):
        if not isinstance(item, dict):
            raise SourceError(f"{meta_path}: {key}[{i}] must be an object, got "
                              f"{type(item).__name__}")
    return items


def _check_captures(meta_path: Path, captures: list[dict], warnings: list[str]) -> float:
    """Field types of every capture; returns the first capture's ``core:frequency`` (or NaN)."""
    previous = -1
    for i, cap in enumerate(captures):
        start = cap.get("core:sample_start")
        if start is None:
            warnings.append(f"{meta_path}: captures[{i}] has no core:sample_start "
                            f"(SigMF requires it)")
        elif not (_is_int(start) and start >= 0):
            raise SourceError(f"{meta_path}: captures[{i}].core:sample_start={start!r} must be "
                              f"an integer >= 0")
        elif start < previous:
            warnings.append(f"{meta_path}: captures[{i}].core:sample_start={start} comes before "
                            f"the previous capture's {previous} (SigMF orders them)")
        else:
            previous = start
        freq = cap.get("core:frequency")
        if freq is not None and not _is_number(freq):
            raise SourceError(f"{meta_path}: captures[{i}].core:frequency={freq!r} must be a "
                              f"number of Hz")
        header = cap.get("core:header_bytes", 0)
        if header != 0:
            raise SourceError(f"{meta_path}: captures[{i}].core:header_bytes={header!r}: "
                              f"non-conforming datasets are not read")
    if captures and captures[0].get("core:frequency") is not None:
        return float(captures[0]["core:frequency"])
    return math.nan


def _check_extent(meta_path: Path, data_path: Path, meta: dict, captures: list[dict], n: int,
                  warnings: list[str]) -> None:
    """Captures inside the data (error) and annotations inside the data (warning)."""
    for i, cap in enumerate(captures):
        start = cap.get("core:sample_start")
        if start is not None and start >= n:
            raise SourceError(f"{meta_path}: captures[{i}].core:sample_start={start} is past the "
                              f"end of the data ({n} samples in {data_path.name})")
    try:
        annotations = _object_list(meta_path, meta, "annotations")
    except SourceError as exc:  # annotations only label the data; playing on is safe
        warnings.append(f"{exc}; annotations ignored")
        return
    end = 0
    for i, ann in enumerate(annotations):
        start, count = ann.get("core:sample_start", 0), ann.get("core:sample_count", 0)
        if not (_is_int(start) and _is_int(count) and start >= 0 and count >= 0):
            warnings.append(f"{meta_path}: annotations[{i}] core:sample_start={start!r}, "
                            f"core:sample_count={count!r} are not counts of samples; ignored")
            continue
        end = max(end, start + count)
    if end > n:
        warnings.append(f"{meta_path}: annotations reach sample {end} but {data_path.name} holds "
                        f"{n} samples (data shorter than its annotations)")


def _check_values(meta_path: Path, datatype: str, raw: np.ndarray) -> None:
    """Refuse data whose first samples betray the other datatype (see the module docstring)."""
    if datatype == "cf32_le":
        head = np.asarray(raw[:_PLAUSIBILITY_SAMPLES]).view(np.float32)
        with np.errstate(invalid="ignore"):
            bad = np.count_nonzero(~(np.abs(head) <= _CF32_PLAUSIBLE_MAX))  # NaN counts too
        if bad:
            raise SourceError(f"{meta_path}: core:datatype='cf32_le' but {bad} of the first "
                              f"{head.size} I and Q values are NaN, infinite or beyond "
                              f"{_CF32_PLAUSIBLE_MAX:g}: damaged data, or int16 samples?")
        return
    pairs = np.asarray(raw[:2 * _PLAUSIBILITY_SAMPLES]).reshape(-1, 2).astype(np.int32)
    pairs = pairs[np.any(pairs != 0, axis=1)]  # zeros are zeros in either datatype
    if pairs.shape[0] < 256:
        return
    i_mag, q_mag = np.abs(pairs[:, 0]), np.abs(pairs[:, 1])
    # Upper halves of float32 values between 2**-16 and 16 in magnitude: |int16| 14208..18560.
    q_in_band = np.mean((q_mag >= 14000) & (q_mag <= 18700))
    i_spread = np.mean(i_mag > 20000)  # a uniform lower half lands here with probability 0.39
    q_spread = np.mean(q_mag > 20000)
    if q_in_band > 0.95 and q_spread < 0.01 and i_spread > 0.25:
        raise SourceError(f"{meta_path}: core:datatype='ci16_le' but the data looks like "
                          f"float32 (every Q value is a float's upper half); is it cf32_le?")


def read_sigmf(path: str | Path) -> Recording:
    """Open a SigMF recording (``NAME``, ``NAME.sigmf-meta`` or ``NAME.sigmf-data``).

    Returns
    -------
    Recording
        With ``warnings`` for problems where reading on is safe.

    Raises
    ------
    SourceError
        A missing or unreadable file, bad JSON, a missing or malformed field, an unsupported
        datatype or data that does not fit the meta; the message names the file and the field
        (the module docstring lists every check).
    """
    meta_path, data_path = _paths(path)
    warnings: list[str] = []
    meta = _read_meta(meta_path)
    datatype, rate = _check_global(meta_path, meta["global"], warnings)
    captures = _object_list(meta_path, meta, "captures")
    center = _check_captures(meta_path, captures, warnings)
    if data_path.is_dir():
        raise SourceError(f"{data_path}: is a folder, not a SigMF data file")
    try:
        size = data_path.stat().st_size
    except FileNotFoundError:
        raise SourceError(f"{data_path}: no such SigMF data file") from None
    except OSError as exc:
        raise SourceError(f"{data_path}: cannot read: {exc}") from exc
    item = _SAMPLE_BYTES[datatype]
    if size == 0:
        raise SourceError(f"{data_path}: is empty (no samples)")
    if size % item:
        raise SourceError(f"{data_path}: {size} bytes is not a whole number of {datatype} "
                          f"samples ({item} bytes each); is core:datatype right?")
    n = size // item
    _check_extent(meta_path, data_path, meta, captures, n, warnings)
    try:
        raw = np.memmap(data_path, dtype=_DTYPES[datatype], mode="r")
    except (OSError, ValueError) as exc:
        raise SourceError(f"{data_path}: cannot map: {exc}") from exc
    _check_values(meta_path, datatype, raw)
    return Recording(meta_path, data_path, datatype, rate, center, n, raw, tuple(warnings))


def write_sigmf(path: str | Path, samples: np.ndarray, *, sample_rate_hz: float,
                center_hz: float | None = None, datatype: str = "cf32_le",
                description: str = "") -> tuple[Path, Path]:
    """Write complex samples as a SigMF recording; returns ``(meta_path, data_path)``.

    ``ci16_le`` stores ``round(x * 32768)``, saturating at -32768 and +32767 (which is how a
    receiver's ADC clips); :func:`read_sigmf` and the SigMF library read it back as
    ``value / 32768``.
    """
    if datatype not in _DTYPES:
        raise ValueError(f"datatype={datatype!r} is not one of {sorted(_DTYPES)}")
    meta_path, data_path = _paths(path)
    x = np.asarray(samples).ravel()
    if datatype == "ci16_le":
        pairs = np.empty(2 * x.size, np.float64)
        pairs[0::2], pairs[1::2] = x.real, x.imag
        raw = np.clip(np.rint(pairs * CI16_FULL_SCALE), -_CI16_MAX - 1, _CI16_MAX).astype("<i2")
    else:
        raw = x.astype("<c8")
    capture = {"core:sample_start": 0}
    if center_hz is not None:
        capture["core:frequency"] = float(center_hz)
    meta = {
        "global": {"core:datatype": datatype, "core:sample_rate": float(sample_rate_hz),
                   "core:version": SIGMF_VERSION, "core:description": description,
                   "core:recorder": "brimline"},
        "captures": [capture],
        "annotations": [],
    }
    try:
        data_path.parent.mkdir(parents=True, exist_ok=True)
        with open(data_path, "wb") as f:
            f.write(raw.tobytes())
        with open(meta_path, "w", encoding="utf-8") as f:
            json.dump(meta, f, indent=2)
            f.write("\n")
    except OSError as exc:
        raise SourceError(f"{data_path}: cannot write recording: {exc}") from exc
    return meta_path, data_path


class IqDriver(Driver):
    """Estimates from a SigMF IQ recording, through the same receiver as the simulator.

    Parameters
    ----------
    plan : TonePlan
        Tone plan and frame layout the recording was made with.
    path : str
        The recording (``NAME``, ``NAME.sigmf-meta`` or ``NAME.sigmf-data``).
    default_bits : int
        Bits per tone of the transmitter's default map (frames with header sequence -1).
    start_s : float
        ``time_s`` of the recording's first sample.
    realtime : bool
        Pace estimates at the recording's sample clock.
    max_frames : int or None
        Stop after this many estimates.
    sync_threshold : float
        Receiver frame detection threshold.

    Frames with a published map's sequence number are estimated from the training symbols and
    header only (the recording does not carry the maps). ci16 recordings flag frames with
    samples at full scale as "clipped" (``valid=False``). NaN or infinite cf32 samples past the
    ones :func:`read_sigmf` checks are replaced by zeros and counted (``non_finite_samples``).

    Raises
    ------
    SourceError
        The recording cannot be read or fails a check of :func:`read_sigmf`.
    ConfigError
        Its sample rate differs from the link's, or ``default_bits`` or ``max_frames`` is out
        of range.
    """

    name = "iq"

    def __init__(self, *, plan: TonePlan, path: str, default_bits: int = 2, start_s: float = 0.0,
                 realtime: bool = False, max_frames: int | None = None,
                 sync_threshold: float = 0.3) -> None:
        super().__init__()
        self.plan = as_link_plan(plan)
        if not 0 <= default_bits <= self.plan.max_bits:
            raise ConfigError(f"driver.iq.default_bits={default_bits} must be in "
                              f"[0, link.max_bits={self.plan.max_bits}]")
        if max_frames is not None and max_frames < 1:
            raise ConfigError(f"driver.iq.max_frames={max_frames} must be >= 1")
        self.recording = read_sigmf(path)
        rate = self.recording.sample_rate_hz
        if not math.isclose(rate, self.plan.sample_rate_hz, rel_tol=1e-9):
            raise ConfigError(f"driver.iq.path={path}: core:sample_rate={rate:g} Hz differs from "
                              f"link.sample_rate_hz={self.plan.sample_rate_hz:g}")
        for warning in self.recording.warnings:
            log.warning("%s", warning)
        # ci16 full scale: +32767 and -32768 (and -32767) count as clipped.
        clip = ((_CI16_MAX - 0.5) / CI16_FULL_SCALE if self.recording.datatype == "ci16_le"
                else None)
        self.receiver = Receiver(self.plan, default_bits=default_bits,
                                 sync_threshold=sync_threshold, clip_level=clip)
        self.start_s = float(start_s)
        self.realtime = bool(realtime)
        self.max_frames = max_frames

    def _frames(self) -> Iterator[Estimate]:
        rec, plan = self.recording, self.plan
        scanner = FrameScanner(self.receiver)
        chunk = 16 * plan.frame_len
        t0 = time.monotonic()
        count = 0
        for start in range(0, max(rec.n_samples, 1), chunk):
            if self.closed:
                return
            stop = min(start + chunk, rec.n_samples)
            block = rec.samples(start, stop)
            finite = np.isfinite(block.real) & np.isfinite(block.imag)
            if not finite.all():  # cf32 damage past the samples read_sigmf checked
                self.counters["non_finite_samples"] += int(block.size - finite.sum())
                block = np.where(finite, block, np.complex64(0))
            found = scanner.feed(block, final=stop >= rec.n_samples)
            for offset, res in found:
                if res.reason:
                    self.counters[res.reason] += 1
                if not res.has_estimate:
                    continue
                t_rec = offset / rec.sample_rate_hz
                if self.realtime:
                    delay = t0 + t_rec - time.monotonic()
                    if delay > 0 and self._closed.wait(delay):
                        return
                if self.closed:
                    return
                self.counters["frames"] += 1
                yield res.to_estimate(plan=plan, frame=count, time_s=self.start_s + t_rec)
                count += 1
                if self.max_frames is not None and count >= self.max_frames:
                    return

    def _release(self) -> None:
        self.recording = None  # drops the memory map; a running generator keeps its own reference
