"""The sink interface: where the transmitter's samples go.

A sink has ``send(samples)`` (one frame slot of complex samples in full-scale units: 1.0 is the
converter's full scale; the transmitter has already applied the digital backoff and clipped to
full scale), ``silence()`` (stop the output now: zero output, buffers destroyed, attenuation to
its maximum where there is hardware; the next ``send()`` starts again), ``close()`` (silences
first, then releases; idempotent) and a ``counters`` mapping, and is a context manager.

A sink that can lose its device for a while (the radio) says so in ``state`` (``running``,
``reconnecting``, ``failed``) and ``ready(now_s)``; ``send()`` returns whether the slot went out.

``paced`` says whether ``send()`` itself keeps real-time pace (a radio's buffers block while the
hardware is busy); for an unpaced sink (file, socket) the transmitter paces itself when asked.
Only a sink that cannot work at all raises :class:`~brimline.daemon.errors.SinkError`.
"""

from __future__ import annotations

import abc
import collections

import numpy as np

__all__ = ["Sink"]


class Sink(abc.ABC):
    """Base class of every transmit sink."""

    #: Short name for logs and the status stream ("radio", "sigmf", "stream").
    name: str = "sink"
    #: True when ``send()`` blocks at real-time pace.
    paced: bool = False
    #: "running"; a supervised sink also "reconnecting" (device being rebuilt) or "failed".
    state: str = "running"

    def __init__(self) -> None:
        self._closed = False
        #: Counts: "slots" (sent), "silenced", "underruns", "dropped", ...
        self.counters: collections.Counter[str] = collections.Counter()

    @property
    def closed(self) -> bool:
        """True once ``close()`` has been called."""
        return self._closed

    def ready(self, now_s: float) -> bool:
        """True when a slot can go out now (a supervised sink reopens its device when due)."""
        return self.state == "running"

    def send(self, samples: np.ndarray) -> bool:
        """Send one frame slot of samples (complex, full-scale units).

        Returns
        -------
        bool
            True when the slot went out; False when the sink lost its device (it is silent
            until :meth:`ready` has rebuilt it).
        """
        if self._closed:
            raise RuntimeError(f"{self.name} sink is closed")
        self._send(np.asarray(samples, dtype=np.complex64))
        if self.state != "running":
            return False
        self.counters["slots"] += 1
        return True

    @abc.abstractmethod
    def _send(self, samples: np.ndarray) -> None:
        """Sink-specific sending."""

    def silence(self) -> None:
        """Stop the output now (idempotent; ``send()`` starts it again)."""
        if not self._closed:
            self._silence()
            self.counters["silenced"] += 1

    def _silence(self) -> None:
        """Sink-specific silencing."""

    def close(self) -> None:
        """Silence the output, then release the sink. Idempotent."""
        if self._closed:
            return
        try:
            self.silence()
        finally:
            self._closed = True
            self._release()

    def _release(self) -> None:
        """Release files, sockets, devices; called once by ``close()``."""

    def __enter__(self):
        return self

    def __exit__(self, *exc) -> None:
        self.close()
