"""A SigMF IQ file as the transmit sink: :class:`SigmfSink`.

Samples are written as ``ci16_le`` as they come, through the project's one SigMF writer
(:class:`brimline.daemon.wire.sigmf.CaptureWriter`: ``round(x * 32768)`` saturating at -32768
and +32767, the scale the SigMF library reads back as ``value / 32768``; the meta file with its
checksum is written at ``close()``, so an unfinished file has no meta and is not mistaken for a
recording). An existing recording is never overwritten. Silence in a file is the absence of
frame slots: ``silence()`` writes nothing.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from brimline.daemon.errors import RecordingError, SinkError
from brimline.daemon.wire.sigmf import CaptureWriter
from brimline.drivers.sinks.base import Sink

__all__ = ["SigmfSink", "sigmf_paths"]


def sigmf_paths(path: str | Path) -> tuple[Path, Path]:
    """``(meta_path, data_path)`` of a recording named ``NAME``, ``NAME.sigmf-meta`` or
    ``NAME.sigmf-data``."""
    p = Path(path)
    if p.suffix in (".sigmf-meta", ".sigmf-data"):
        p = p.with_suffix("")
    return p.with_name(p.name + ".sigmf-meta"), p.with_name(p.name + ".sigmf-data")


class SigmfSink(Sink):
    """Transmitted samples into a SigMF recording.

    Parameters
    ----------
    path : str or Path
        Recording name (``NAME`` gives ``NAME.sigmf-meta`` and ``NAME.sigmf-data``).
    sample_rate_hz : float
        Sample rate written into the meta.
    center_hz : float or None
        Centre frequency for the capture segment (None or NaN: not written).
    description : str
        ``core:description``.

    Raises
    ------
    SinkError
        When the recording exists already or its data file cannot be created.
    """

    name = "sigmf"

    def __init__(self, path: str | Path, *, sample_rate_hz: float,
                 center_hz: float | None = None, description: str = "brimline tx") -> None:
        super().__init__()
        self.meta_path, self.data_path = sigmf_paths(path)
        centre = None if center_hz is None or not math.isfinite(center_hz) else center_hz
        try:
            self._writer = CaptureWriter(self.data_path, sample_rate_hz=sample_rate_hz,
                                         datatype="ci16_le", center_hz=centre,
                                         description=description)
        except (RecordingError, ValueError) as exc:
            raise SinkError(f"tx.path={self.data_path}: {exc}") from exc
        self.sample_rate_hz = float(sample_rate_hz)
        self.samples_written = 0

    def _send(self, samples: np.ndarray) -> None:
        try:
            self._writer.write(samples)
        except RecordingError as exc:
            raise SinkError(f"tx.path={self.data_path}: cannot write: {exc}") from exc
        self.samples_written += samples.size

    def _release(self) -> None:
        try:
            self._writer.close()
        except RecordingError as exc:
            raise SinkError(f"tx.path={self.meta_path}: cannot write: {exc}") from exc
