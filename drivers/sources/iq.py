"""Recorded IQ through the receiver DSP: :class:`IqDriver`.

The SigMF reading and writing (every input check, the tone-plan extension, capture segments,
the checksum) live in :mod:`brimline.daemon.wire.sigmf`; this module re-exports
:func:`read_sigmf`, :func:`write_sigmf`, :class:`Recording`, :class:`CaptureWriter` and
:data:`CI16_FULL_SCALE` for the code that has always found them here.

The receiver runs over each capture segment on its own (a gap, an overflow or a retune breaks
the sample stream, so no frame is searched across one), and an estimate's ``time_s`` counts the
samples lost before its segment (``core:global_index``). A segment is read in spans of 16
frames, and the frames located in a span are estimated together, several per pass
(:class:`~brimline.drivers.link.receiver.FrameScanner`); a frame that fails is counted under
its reason on its own.

IQ capture while running: given a :class:`CaptureWriter` (``capture=``, opened by the runtime
from the ``record.iq`` section), the driver copies every block it reads into it through a
:class:`~brimline.drivers.sources.base.CaptureFeed` and starts a new capture segment wherever
the recording it plays had one.
"""

from __future__ import annotations

import logging
import math
import time
from typing import Iterator

import numpy as np

from brimline.daemon.errors import ConfigError
from brimline.daemon.records import Estimate, TonePlan
from brimline.daemon.wire.sigmf import (
    CI16_FULL_SCALE,
    CaptureWriter,
    Recording,
    Segment,
    read_sigmf,
    write_sigmf,
)
from brimline.drivers.link.frame import as_link_plan
from brimline.drivers.link.receiver import FrameScanner, Receiver, RxFrame
from brimline.drivers.sources.base import CaptureFeed, Driver

__all__ = ["IqDriver", "Recording", "CaptureWriter", "read_sigmf", "write_sigmf",
           "CI16_FULL_SCALE"]

log = logging.getLogger("brimline.sources.iq")

#: Largest int16 value (ci16 positive full scale).
_CI16_MAX = 32767


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
    capture : CaptureWriter or None
        Where to copy the samples read (the runtime's IQ capture, ``record.iq``; not a key of
        ``driver.iq``). The caller owns it and closes it.

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
                 sync_threshold: float = 0.3, capture: CaptureWriter | None = None) -> None:
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
        recorded = self.recording.plan_id
        if recorded is not None and recorded != self.plan.plan_id:
            raise ConfigError(f"driver.iq.path={path}: recorded with tone plan {recorded} "
                              f"(brimline:tone_plan), but the link section gives "
                              f"{self.plan.plan_id}")
        # ci16 full scale: +32767 and -32768 (and -32767) count as clipped.
        clip = ((_CI16_MAX - 0.5) / CI16_FULL_SCALE if self.recording.datatype == "ci16_le"
                else None)
        self.receiver = Receiver(self.plan, default_bits=default_bits,
                                 sync_threshold=sync_threshold, clip_level=clip)
        self.start_s = float(start_s)
        self.realtime = bool(realtime)
        self.max_frames = max_frames
        self._capture = CaptureFeed(capture, self.counters, log)

    def _frames(self) -> Iterator[Estimate]:
        rec = self.recording
        t0 = time.monotonic()
        count = 0
        for i, seg in enumerate(rec.segments):
            if i:
                self._mark_segment(seg, rec.segments[i - 1])
            # Samples lost before this segment shift its time (core:global_index).
            shift = seg.global_index - seg.sample_start
            for offset, est in self._segment_frames(rec, seg):
                t_rec = (offset + shift) / rec.sample_rate_hz
                if self.realtime:
                    delay = t0 + t_rec - time.monotonic()
                    if delay > 0 and self._closed.wait(delay):
                        return
                if self.closed:
                    return
                self.counters["frames"] += 1
                yield est.to_estimate(plan=self.plan, frame=count, time_s=self.start_s + t_rec)
                count += 1
                if self.max_frames is not None and count >= self.max_frames:
                    return
            if self.closed:
                return

    def _segment_frames(self, rec: Recording, seg: Segment) -> Iterator[tuple[int, RxFrame]]:
        """``(absolute sample index, RxFrame)`` of every frame with an estimate in ``seg``."""
        scanner = FrameScanner(self.receiver)
        chunk = 16 * self.plan.frame_len
        end = seg.sample_start + seg.sample_count
        for start in range(seg.sample_start, max(end, seg.sample_start + 1), chunk):
            if self.closed:
                return
            stop = min(start + chunk, end)
            block = rec.samples(start, stop)
            finite = np.isfinite(block.real) & np.isfinite(block.imag)
            if not finite.all():  # cf32 damage past the samples read_sigmf checked
                self.counters["non_finite_samples"] += int(block.size - finite.sum())
                block = np.where(finite, block, np.complex64(0))
            self._capture.write(block)
            for offset, res in scanner.feed(block, final=stop >= end):
                if res.reason:
                    self.counters[res.reason] += 1
                if res.has_estimate:
                    yield seg.sample_start + offset, res

    # ------------------------------------------------------------------ IQ capture

    def _mark_segment(self, seg: Segment, previous: Segment) -> None:
        """Start a capture segment where the played recording starts one."""
        lost = (seg.global_index - seg.sample_start) - (previous.global_index
                                                        - previous.sample_start)
        if seg.reason == "retune" and math.isfinite(seg.center_hz):
            self._capture.retune(seg.center_hz)
        elif seg.reason == "overflow":
            self._capture.overflow(max(lost, 0))
        else:
            self._capture.gap(max(lost, 0))

    def _release(self) -> None:
        self.recording = None  # drops the memory map; a running generator keeps its own reference
