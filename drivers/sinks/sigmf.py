"""A SigMF IQ file as the transmit sink: :class:`SigmfSink`.

Samples are written as ``ci16_le`` as they come (``round(x * 32768)``, saturating at -32768 and
+32767, the scale :func:`brimline.drivers.sources.iq.read_sigmf` and the SigMF library read
back as ``value / 32768``); the meta file is written at ``close()``, so an unfinished file has
no meta and is not mistaken for a recording. An existing recording is never overwritten.
Silence in a file is the absence of frame slots: ``silence()`` writes nothing.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np

from brimline.daemon.errors import SinkError
from brimline.drivers.sinks.base import Sink
from brimline.drivers.sources.iq import CI16_FULL_SCALE, SIGMF_VERSION

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
        for p in (self.meta_path, self.data_path):
            if p.exists():
                raise SinkError(f"tx.path={p}: exists already (the sink never overwrites)")
        self.sample_rate_hz = float(sample_rate_hz)
        self.center_hz = center_hz
        self.description = description
        self.samples_written = 0
        try:
            self.data_path.parent.mkdir(parents=True, exist_ok=True)
            self._file = open(self.data_path, "xb")
        except OSError as exc:
            raise SinkError(f"tx.path={self.data_path}: cannot create: {exc}") from exc

    def _send(self, samples: np.ndarray) -> None:
        pairs = np.empty(2 * samples.size, np.float64)
        pairs[0::2], pairs[1::2] = samples.real, samples.imag
        raw = np.clip(np.rint(pairs * CI16_FULL_SCALE), -32768, 32767).astype("<i2")
        try:
            self._file.write(raw.tobytes())
        except OSError as exc:
            raise SinkError(f"tx.path={self.data_path}: cannot write: {exc}") from exc
        self.samples_written += samples.size

    def _release(self) -> None:
        self._file.close()
        capture = {"core:sample_start": 0}
        if self.center_hz is not None and math.isfinite(self.center_hz):
            capture["core:frequency"] = float(self.center_hz)
        meta = {
            "global": {"core:datatype": "ci16_le", "core:sample_rate": self.sample_rate_hz,
                       "core:version": SIGMF_VERSION, "core:description": self.description,
                       "core:recorder": "brimline"},
            "captures": [capture],
            "annotations": [],
        }
        try:
            with open(self.meta_path, "w", encoding="utf-8") as f:
                json.dump(meta, f, indent=2)
                f.write("\n")
        except OSError as exc:
            raise SinkError(f"tx.path={self.meta_path}: cannot write: {exc}") from exc
