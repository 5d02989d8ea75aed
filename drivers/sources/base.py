"""The driver interface: a source of per-frame channel estimates.

A driver is anything with ``frames()`` (an iterator of :class:`Estimate`), ``close()`` and a
``counters`` mapping, usable as a context manager. The simulator, recorded IQ, estimate replay,
the radio and test fakes all implement it, so the service never knows which one it runs.

Threading: the service iterates ``frames()`` on a driver thread of its own. ``close()`` may be
called from any thread; ``frames()`` then returns at the next frame boundary. ``close()`` is
idempotent, and calling ``frames()`` after it raises ``RuntimeError``.

An IQ source given the runtime's IQ capture (``record.iq``, a
:class:`~brimline.daemon.wire.sigmf.CaptureWriter`) copies the samples it reads into it through
a :class:`CaptureFeed`, the one path from a source to the capture: samples in the order read,
a new capture segment at every discontinuity the source knows of, and a capture that cannot be
written dropped (logged once, counted ``capture_errors``) while the estimates go on.

Bad input never escapes as an exception: a frame that cannot be synchronised, is truncated,
clipped or fails its header CRC is counted under a reason in ``counters`` and either skipped or
yielded with ``valid=False`` / ``header_ok=False``. Only a source that cannot work at all (device
missing, file unreadable) raises :class:`~brimline.daemon.errors.SourceError`.
"""

from __future__ import annotations

import abc
import collections
import logging
import threading
from typing import Any, Callable, Iterator

import numpy as np

from brimline.daemon.errors import RecordingError
from brimline.daemon.records import Estimate, LoadMap

__all__ = ["Driver", "MapProvider", "CaptureFeed"]

#: Called by a driver (on its own thread, once per frame) with the index of the frame about to be
#: sent, for the map the transmitter should use for it; returns None while there is none.
MapProvider = Callable[[int], "LoadMap | None"]


class Driver(abc.ABC):
    """Base class of every estimate source."""

    #: Short name for logs and the status stream ("sim", "replay", "iq", "radio", ...).
    name: str = "driver"

    def __init__(self) -> None:
        self._closed = threading.Event()
        #: Counts by reason: "frames", "no_sync", "crc_failed", "truncated", "clipped", ...
        self.counters: collections.Counter[str] = collections.Counter()

    @property
    def closed(self) -> bool:
        """True once ``close()`` has been called."""
        return self._closed.is_set()

    def frames(self) -> Iterator[Estimate]:
        """Yield estimates until the source ends or ``close()`` is called."""
        if self.closed:
            raise RuntimeError(f"{self.name} driver is closed")
        return self._frames()

    @abc.abstractmethod
    def _frames(self) -> Iterator[Estimate]:
        """Driver-specific generator; must check ``self.closed`` at every frame."""

    def close(self) -> None:
        """Stop the source and release its resources. Idempotent, callable from any thread."""
        if not self._closed.is_set():
            self._closed.set()
            self._release()

    def _release(self) -> None:
        """Release driver resources (files, devices); called once by ``close()``."""

    def __enter__(self):
        return self

    def __exit__(self, *exc) -> None:
        self.close()


class CaptureFeed:
    """A source's copy of the IQ samples it reads into the runtime's IQ capture.

    Parameters
    ----------
    capture : CaptureWriter or None
        The runtime's capture (``record.iq``), which the runtime opens, owns and closes after
        the driver thread has stopped; None: nothing is copied.
    counters : collections.Counter
        The driver's counters (``capture_errors`` is counted there).
    log : logging.Logger
        The driver's logger.

    Notes
    -----
    A write the capture refuses (:class:`~brimline.daemon.errors.RecordingError`: disk full,
    ...) is logged once and counted, and the capture is dropped; a capture closed under the
    driver by the runtime's shutdown (``RuntimeError``) is dropped silently. Either way the
    source goes on yielding estimates.
    """

    def __init__(self, capture, counters: collections.Counter, log: logging.Logger) -> None:
        self._capture = capture
        self._counters = counters
        self._log = log

    @property
    def active(self) -> bool:
        """Whether samples are still being copied."""
        return self._capture is not None

    def write(self, samples: np.ndarray) -> None:
        """Append samples (complex, full scale 1.0) to the capture's current segment."""
        if self._capture is None:
            return
        try:
            self._capture.write(samples)
        except RecordingError as exc:
            self._counters["capture_errors"] += 1
            self._log.error("IQ capture stopped, estimates go on without it: %s", exc)
            self._capture = None
        except RuntimeError:  # closed under us by the runtime's shutdown
            self._capture = None

    def gap(self, lost_samples: int | None = None) -> None:
        """Samples were lost (None: how many is not known); the next write starts a segment."""
        self._mark("gap", lost_samples)

    def overflow(self, lost_samples: int | None = None) -> None:
        """The device dropped samples; the next write starts a segment."""
        self._mark("overflow", lost_samples)

    def retune(self, center_hz: float) -> None:
        """The radio moved to ``center_hz``; the next write starts a segment."""
        self._mark("retune", center_hz)

    def _mark(self, call: str, value: Any) -> None:
        if self._capture is None:
            return
        try:
            getattr(self._capture, call)(value)
        except RuntimeError:  # closed under us by the runtime's shutdown
            self._capture = None
