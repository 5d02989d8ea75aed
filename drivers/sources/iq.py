"""Recorded IQ through the receiver DSP: SigMF reading and writing, and :class:`IqDriver`.

A SigMF recording is a JSON metadata file ``NAME.sigmf-meta`` next to the raw samples
``NAME.sigmf-data``. brimline reads and writes the core fields it needs (``core:datatype``,
``core:sample_rate``, ``core:version``, ``captures[].core:sample_start`` and
``core:frequency``, ``core:description``) with the standard library's json module; datatypes
``cf32_le`` (complex float32) and ``ci16_le`` (complex int16, full scale 32767 = 1.0).
"""

from __future__ import annotations

import json
import math
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Iterator

import numpy as np

from brimline.daemon.errors import ConfigError, SourceError
from brimline.daemon.records import Estimate, TonePlan
from brimline.drivers.link.frame import as_link_plan
from brimline.drivers.link.receiver import FrameScanner, Receiver
from brimline.drivers.sources.base import Driver

__all__ = ["IqDriver", "Recording", "read_sigmf", "write_sigmf", "CI16_FULL_SCALE"]

#: ci16 integer value that stands for amplitude 1.0.
CI16_FULL_SCALE = 32767.0
_DTYPES = {"cf32_le": np.dtype("<c8"), "ci16_le": np.dtype("<i2")}
SIGMF_VERSION = "1.0.0"


def _paths(path: str | Path) -> tuple[Path, Path]:
    p = Path(path)
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
    """

    meta_path: Path
    data_path: Path
    datatype: str
    sample_rate_hz: float
    center_hz: float
    n_samples: int
    raw: np.ndarray

    def samples(self, start: int, stop: int) -> np.ndarray:
        """Samples ``start:stop`` as complex64 (ci16 scaled so 32767 is 1.0)."""
        if self.datatype == "ci16_le":
            pairs = np.asarray(self.raw[2 * start:2 * stop], dtype=np.float32)
            return (pairs[0::2] + 1j * pairs[1::2]).astype(np.complex64) / CI16_FULL_SCALE
        return np.asarray(self.raw[start:stop], dtype=np.complex64)


def read_sigmf(path: str | Path) -> Recording:
    """Open a SigMF recording (``NAME``, ``NAME.sigmf-meta`` or ``NAME.sigmf-data``).

    Raises
    ------
    SourceError
        A missing or unreadable file, bad JSON, a missing key or an unsupported datatype; the
        message names the file and the key.
    """
    meta_path, data_path = _paths(path)
    try:
        meta = json.loads(meta_path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise SourceError(f"{meta_path}: no such SigMF metadata file") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise SourceError(f"{meta_path}: cannot read: {exc}") from exc
    except json.JSONDecodeError as exc:
        raise SourceError(f"{meta_path} line {exc.lineno}: not valid JSON: {exc.msg}") from exc
    glob = meta.get("global") if isinstance(meta, dict) else None
    if not isinstance(glob, dict):
        raise SourceError(f"{meta_path}: no 'global' object")
    datatype = glob.get("core:datatype")
    if datatype not in _DTYPES:
        raise SourceError(f"{meta_path}: core:datatype={datatype!r} is not one of "
                          f"{sorted(_DTYPES)}")
    rate = glob.get("core:sample_rate")
    if not isinstance(rate, (int, float)) or not rate > 0:
        raise SourceError(f"{meta_path}: core:sample_rate={rate!r} must be a positive number")
    captures = meta.get("captures") or [{}]
    center = captures[0].get("core:frequency", math.nan) if isinstance(captures[0], dict) else math.nan
    try:
        size = data_path.stat().st_size
    except FileNotFoundError:
        raise SourceError(f"{data_path}: no such SigMF data file") from None
    item = 2 * _DTYPES[datatype].itemsize if datatype == "ci16_le" else _DTYPES[datatype].itemsize
    if size % item:
        raise SourceError(f"{data_path}: {size} bytes is not a whole number of {datatype} samples")
    n = size // item
    try:
        raw = (np.memmap(data_path, dtype=_DTYPES[datatype], mode="r") if size
               else np.zeros(0, _DTYPES[datatype]))
    except (OSError, ValueError) as exc:
        raise SourceError(f"{data_path}: cannot map: {exc}") from exc
    return Recording(meta_path, data_path, datatype, float(rate), float(center), n, raw)


def write_sigmf(path: str | Path, samples: np.ndarray, *, sample_rate_hz: float,
                center_hz: float | None = None, datatype: str = "cf32_le",
                description: str = "") -> tuple[Path, Path]:
    """Write complex samples as a SigMF recording; returns ``(meta_path, data_path)``.

    ``ci16_le`` stores ``round(x * 32767)``, saturating at +-32767 (which is how a
    receiver's ADC clips).
    """
    if datatype not in _DTYPES:
        raise ValueError(f"datatype={datatype!r} is not one of {sorted(_DTYPES)}")
    meta_path, data_path = _paths(path)
    x = np.asarray(samples).ravel()
    if datatype == "ci16_le":
        pairs = np.empty(2 * x.size, np.float64)
        pairs[0::2], pairs[1::2] = x.real, x.imag
        raw = np.clip(np.rint(pairs * CI16_FULL_SCALE), -32767, 32767).astype("<i2")
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
    samples at full scale as "clipped" (``valid=False``).
    """

    name = "iq"

    def __init__(self, *, plan: TonePlan, path: str, default_bits: int = 2, start_s: float = 0.0,
                 realtime: bool = False, max_frames: int | None = None,
                 sync_threshold: float = 0.3) -> None:
        super().__init__()
        self.plan = as_link_plan(plan)
        self.recording = read_sigmf(path)
        rate = self.recording.sample_rate_hz
        if not math.isclose(rate, self.plan.sample_rate_hz, rel_tol=1e-9):
            raise ConfigError(f"driver.iq.path={path}: core:sample_rate={rate:g} Hz differs from "
                              f"link.sample_rate_hz={self.plan.sample_rate_hz:g}")
        clip = 1.0 - 0.5 / CI16_FULL_SCALE if self.recording.datatype == "ci16_le" else None
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
            found = scanner.feed(rec.samples(start, stop), final=stop >= rec.n_samples)
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
