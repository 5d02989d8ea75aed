"""The driver interface: a source of per-frame channel estimates.

A driver is anything with ``frames()`` (an iterator of :class:`Estimate`), ``close()`` and a
``counters`` mapping, usable as a context manager. The simulator, recorded IQ, estimate replay,
the radio and test fakes all implement it, so the service never knows which one it runs.

Threading: the service iterates ``frames()`` on a driver thread of its own. ``close()`` may be
called from any thread; ``frames()`` then returns at the next frame boundary. ``close()`` is
idempotent, and calling ``frames()`` after it raises ``RuntimeError``.

Bad input never escapes as an exception: a frame that cannot be synchronised, is truncated,
clipped or fails its header CRC is counted under a reason in ``counters`` and either skipped or
yielded with ``valid=False`` / ``header_ok=False``. Only a source that cannot work at all (device
missing, file unreadable) raises :class:`~brimline.daemon.errors.SourceError`.
"""

from __future__ import annotations

import abc
import collections
import threading
from typing import Callable, Iterator

from brimline.daemon.records import Estimate, LoadMap

__all__ = ["Driver", "MapProvider"]

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
