"""The transmitter loop of ``brimline tx``: follow the maps, build frames, feed a sink.

One :class:`TxLoop` step is one frame slot:

1. poll the :class:`~brimline.daemon.net.follower.Follower` (every map it adopts has passed
   :func:`~brimline.daemon.net.follower.check_map`) and schedule the adopted maps for their
   effective frame (:class:`~brimline.drivers.link.schedule.MapSchedule`);
2. decide the state from the follower's heartbeat: ``following``; ``holding`` (no heartbeat
   for the follower's timeout: the last good map stays in force for ``hold_s``); then ``safe``
   (the default map: ``default_bits`` on every data tone at nominal power, header sequence
   "none") or ``silent`` (the sink silenced, no frames), as ``on_loss`` says. A heartbeat again
   returns to ``following`` with the follower's map in force from the next frame;
3. ask the sink whether it can send (:meth:`~brimline.drivers.sinks.base.Sink.ready`): a radio
   whose device failed or vanished is being rebuilt with capped exponential backoff (see
   :mod:`brimline.drivers.sinks.radio`); meanwhile no frame is built, the transmitter is
   silent, the frame counter stands still (counted ``slots_down``), and the status says
   ``device: reconnecting`` (or ``failed``, which ends the loop with a ``SinkError``). When the
   device is back, frames resume with the map in force at the counter;
4. take the map in force at this frame's counter, bound its power
   (:class:`~brimline.drivers.link.schedule.PowerBound`, counted when it clips), build the
   frame with the map's sequence number and the frame counter in the header, scale it by the
   digital backoff (a frame of nominal tones has RMS ``-backoff_db`` dBFS), clip any sample
   beyond full scale (counted), pad it to the frame slot and send it; when the map in force
   changed with this frame, acknowledge it with the frame (``follower.ack``) once the slot
   went out.

The loop never lowers the hardware attenuation the sink was given; together with the power
bound and the full-scale clip no map can push the output above the configured bound.

Time is injected (``clock``); :meth:`TxLoop.step` takes ``now_s`` so tests drive it with a fake
clock. :meth:`TxLoop.close` silences the sink first (see the sinks), then closes the follower
and the status socket; ``brimline tx`` calls it on exit, on SIGTERM/SIGINT and on an error.
"""

from __future__ import annotations

import collections
import dataclasses
import enum
import logging
import math
import threading
import time
from types import MappingProxyType
from typing import Callable

import numpy as np

from brimline.daemon.errors import SinkError
from brimline.daemon.limits import NON_NEGATIVE, POSITIVE, at_least, between, check_values
from brimline.daemon.net.follower import Follower
from brimline.daemon.net.publisher import StatusPublisher
from brimline.daemon.records import LoadMap
from brimline.drivers.link.frame import LinkPlan, Transmitter, map_arrays, slot_samples
from brimline.drivers.link.schedule import MapSchedule, PowerBound
from brimline.drivers.sinks.base import Sink

__all__ = ["TxLoop", "TxState", "TX_LIMITS", "tx_summary_line",
           "TX_STATUS_TYPE"]

#: ``type`` of the transmitter's status dict (the daemon's is ``status``).
TX_STATUS_TYPE = "tx_status"

_log = logging.getLogger("brimline.tx")

#: Limits of :class:`TxLoop`'s numeric settings (the ``tx:`` section reads them too).
TX_LIMITS = MappingProxyType({
    "frame_rate_hz": POSITIVE,
    "default_bits": at_least(0),
    "backoff_db": between(0.0, 60.0),
    "attenuation_db": between(0.0, 89.75),
    "max_tone_db": between(-60.0, 20.0),
    "max_total_db": between(-60.0, 20.0),
    "hold_s": NON_NEGATIVE,
    "max_lead_frames": at_least(0),
    "status_rate_hz": POSITIVE,
    "max_frames": at_least(1),
})


class TxState(str, enum.Enum):
    """What the transmitter is doing."""

    FOLLOWING = "following"
    HOLDING = "holding"
    SAFE = "safe"
    SILENT = "silent"
    STOPPED = "stopped"


def tx_summary_line(status: dict) -> str:
    """One line of a transmitter status dict, for terminals (``brimline tx``, ``watch``)."""
    return (f"tx {status.get('state', '-')}: map {status.get('map_seq', '-')}, "
            f"frame {status.get('frame', '-')}, sent {status.get('frames_sent', '-')}, "
            f"maps applied {status.get('maps_applied', '-')}, "
            f"underruns {status.get('underruns', '-')}, "
            f"power clipped {status.get('power_clipped', '-')}, "
            f"lag {_or_dash(status.get('applied_lag_frames'))} frames, "
            f"power {_or_dash(status.get('power_db'), '+.1f')} dB "
            f"(limit {_or_dash(status.get('max_total_db'), '+.1f')} dB), "
            f"device {status.get('device', '-')} (reconnects {status.get('reconnects', '-')})")


def _or_dash(value, spec: str = "") -> str:
    return "-" if value is None else format(value, spec)


def _rounded(value: float | None) -> float | None:
    return None if value is None else round(value, 2)


class TxLoop:
    """Follows the maps and transmits frames through a sink, one frame slot per :meth:`step`.

    Parameters
    ----------
    plan : LinkPlan
        Tone plan and frame layout.
    follower : Follower
        The map follower (its ``on_map`` is set here).
    sink : Sink
        Where the slots go.
    frame_rate_hz : float
        Frame slots per second.
    default_bits : int
        Bits per tone of the default (and safe) map.
    backoff_db : float
        Digital backoff: RMS of a frame of nominal tones below full scale, dB.
    max_tone_db, max_total_db : float
        The power bound (see :class:`PowerBound`).
    hold_s : float
        How long the last good map stays in force after heartbeats stop, s.
    on_loss : {"safe", "silent"}
        What follows the hold.
    max_lead_frames : int
        A map naming a frame further ahead than this is in force from the next frame
        (counted ``far_ahead``): the daemon counts frames of another transmitter run.
    seed : int
        Seed of the payload generator.
    status : StatusPublisher or None
        Where the status dict goes (periodically and on every state change).
    clock : callable
        Monotonic seconds.
    """

    def __init__(self, *, plan: LinkPlan, follower: Follower, sink: Sink,
                 frame_rate_hz: float = 50.0, default_bits: int = 2, backoff_db: float = 12.0,
                 max_tone_db: float = 0.0, max_total_db: float = 0.0, hold_s: float = 2.0,
                 on_loss: str = "safe", max_lead_frames: int = 1000, seed: int = 1,
                 status: StatusPublisher | None = None,
                 clock: Callable[[], float] = time.monotonic) -> None:
        check_values(dict(frame_rate_hz=frame_rate_hz, default_bits=default_bits,
                          backoff_db=backoff_db, max_tone_db=max_tone_db,
                          max_total_db=max_total_db, hold_s=hold_s,
                          max_lead_frames=max_lead_frames), TX_LIMITS, prefix="tx.")
        if on_loss not in ("safe", "silent"):
            raise ValueError(f"tx.on_loss={on_loss!r} must be safe or silent")
        if default_bits > plan.max_bits:
            raise ValueError(f"tx.default_bits={default_bits} must be in "
                             f"[0, link.max_bits={plan.max_bits}]")
        self.plan = plan
        self.follower = follower
        self.sink = sink
        self.frame_rate_hz = float(frame_rate_hz)
        self.slot_len = slot_samples(plan, frame_rate_hz, "tx.frame_rate_hz")
        self.default_bits = int(default_bits)
        self.hold_s = float(hold_s)
        self.on_loss = on_loss
        self.max_lead_frames = int(max_lead_frames)
        self.status_publisher = status
        self._clock = clock
        self.transmitter = Transmitter(plan)
        self.bound = PowerBound(plan.data_tones.size, max_tone_db=max_tone_db,
                                max_total_db=max_total_db)
        fmt = self.transmitter.format
        nominal_rms = math.sqrt(fmt.n_used / plan.fft_size)
        self.scale = 10.0 ** (-backoff_db / 20.0) / nominal_rms
        self.schedule = MapSchedule()
        self.rng = np.random.default_rng(seed)
        self.counter = 0  # the next frame's counter (unwrapped; the header keeps 16 bits)
        self.state = TxState.FOLLOWING
        self.in_force: LoadMap | None = None
        self.counters: collections.Counter[str] = collections.Counter()
        self._loss_since_s: float | None = None
        self._device_state = sink.state
        self._closed = False
        #: frames between the map in force's effective frame and the frame it was first sent in
        self.applied_lag_frames: int | None = None
        #: the last frame's data-tone power after the bound: total and peak tone, dB
        self.sent_power_db: float | None = None
        self.sent_peak_tone_db: float | None = None
        follower.on_map = self._on_map

    # ------------------------------------------------------------------ one slot

    def _on_map(self, load_map: LoadMap) -> None:
        if load_map.effective_frame > self.counter + self.max_lead_frames:
            self.counters["far_ahead"] += 1
            load_map = dataclasses.replace(load_map, effective_frame=self.counter)
        self.schedule.schedule(load_map, self.counter)

    def _update_state(self, now_s: float) -> None:
        before = self.state
        if not self.follower.stale(now_s):
            if self.state in (TxState.SAFE, TxState.SILENT, TxState.HOLDING):
                self.counters["recoveries"] += 1
                if self.state is not TxState.HOLDING and self.follower.current is not None:
                    self.schedule.schedule(self.follower.current, self.counter)
            self._loss_since_s = None
            self.state = TxState.FOLLOWING
        else:
            if self._loss_since_s is None:
                self._loss_since_s = now_s
                self.counters["heartbeat_losses"] += 1
            if now_s - self._loss_since_s <= self.hold_s:
                self.state = TxState.HOLDING
            else:
                self.state = TxState.SAFE if self.on_loss == "safe" else TxState.SILENT
        if self.state is not before:
            _log.info("tx: %s -> %s", before.value, self.state.value)
            if self.state is TxState.SILENT:
                self.sink.silence()
            if self.state in (TxState.SAFE, TxState.SILENT):
                self.schedule.clear()
            self._publish(now_s, force=True)

    def step(self, now_s: float | None = None) -> bool:
        """Handle the follower's traffic and send one frame slot (none when silent or while
        the sink's device is being rebuilt).

        Returns
        -------
        bool
            True when a frame was sent.

        Raises
        ------
        SinkError
            The sink cannot work any more (a device that did not come back; the status says
            ``device: failed`` first).
        """
        if self._closed:
            raise RuntimeError("TxLoop is closed")
        now = self._clock() if now_s is None else now_s
        self.follower.poll(0)
        self._update_state(now)
        sent = False
        if self.state is not TxState.SILENT:
            try:
                ready = self.sink.ready(now)
            except SinkError:
                self._publish(now, force=True)
                raise
            if not ready:
                self.counters["slots_down"] += 1  # the device is down: silent, no frame number
            else:
                if self.state is TxState.SAFE:
                    load_map = None
                else:
                    load_map = self.schedule.at(self.counter)[0]
                changed = load_map is not self.in_force
                frame_no = self.counter
                sent = self._send(load_map)
                if sent:
                    self.in_force = load_map
                    if changed and load_map is not None:
                        self.counters["maps_applied"] += 1
                        self.applied_lag_frames = max(0, frame_no - int(load_map.effective_frame))
                        self.follower.ack(frame_no, now, load_map.seq)
                else:
                    self.counters["slots_lost"] += 1
        device = self.sink.state
        self._publish(now, force=device != self._device_state)
        self._device_state = device
        return sent

    def _send(self, load_map: LoadMap | None) -> bool:
        seq, bits, power = map_arrays(self.plan, load_map, self.default_bits)
        bounded = self.bound(power)
        p = bounded.power_lin
        total, peak = float(p.sum()), float(p.max(initial=0.0))
        self.sent_power_db = 10.0 * math.log10(total / p.size) if total > 0 else None
        self.sent_peak_tone_db = 10.0 * math.log10(peak) if peak > 0 else None
        if bounded.clipped:
            self.counters["power_clipped"] += 1
        frame = self.transmitter.frame(bits=bits, power_lin=bounded.power_lin, map_seq=seq,
                                       counter=self.counter, rng=self.rng)
        slot = np.zeros(self.slot_len, np.complex64)
        x = frame.samples * np.float32(self.scale)
        mag = np.abs(x)
        over = mag > 1.0
        if over.any():
            self.counters["samples_clipped"] += int(over.sum())
            x[over] /= mag[over]
        slot[:x.size] = x
        if not self.sink.send(slot):
            return False  # the device failed during the slot: this frame number is used again
        self.counters["frames_sent"] += 1
        self.counter += 1
        return True

    # ------------------------------------------------------------------ status, running

    def status(self, now_s: float) -> dict:
        """The transmitter's status dict (published on the status socket).

        Besides the counters: ``applied_lag_frames`` (how many frames after its effective
        frame the map in force was first sent; 0 is on time, None before any map),
        ``power_db`` (the last frame's total data-tone power after the power bound, relative
        to every data tone at nominal, dB) and ``peak_tone_db`` (its strongest tone, dB), next
        to their limits ``max_total_db`` and ``max_tone_db``.
        """
        device = getattr(self.sink, "device", None)
        underruns = self.counters["late_slots"] + int(
            getattr(device, "counters", {}).get("underruns", 0))
        m = self.in_force
        f = self.follower.counters
        return {
            "type": TX_STATUS_TYPE, "time_s": float(now_s), "state": self.state.value,
            "map_seq": -1 if m is None else int(m.seq),
            "map_epoch": "" if m is None else m.epoch,
            "total_bits": int(self.default_bits * self.plan.data_tones.size
                              if m is None else m.total_bits),
            "frame": int(self.counter), "frames_sent": int(self.counters["frames_sent"]),
            "maps_applied": int(self.counters["maps_applied"]),
            "underruns": int(underruns),
            "power_clipped": int(self.counters["power_clipped"]),
            "samples_clipped": int(self.counters["samples_clipped"]),
            "heartbeat_losses": int(self.counters["heartbeat_losses"]),
            "maps_rejected": int(f["rejected"]), "acks_sent": int(f["acks_sent"]),
            "sink": self.sink.name, "device": self.sink.state,
            "slots_down": int(self.counters["slots_down"] + self.counters["slots_lost"]),
            "device_errors": int(self.sink.counters["device_errors"]
                                 + self.sink.counters["timeouts"]),
            "reconnects": int(self.sink.counters["reconnects"]),
            "reconnect_failures": int(self.sink.counters["reconnect_failures"]),
            "applied_lag_frames": self.applied_lag_frames,
            "power_db": _rounded(self.sent_power_db),
            "peak_tone_db": _rounded(self.sent_peak_tone_db),
            "max_total_db": self.bound.max_total_db, "max_tone_db": self.bound.max_tone_db,
            "frame_rate_hz": self.frame_rate_hz,
        }

    def _publish(self, now_s: float, force: bool = False) -> None:
        pub = self.status_publisher
        if pub is not None and (pub.due(now_s) or force):
            pub.publish(self.status(now_s))

    def run(self, stop: threading.Event, *, realtime: bool = True,
            max_frames: int | None = None,
            on_step: Callable[[float], None] | None = None) -> None:
        """Step until ``stop`` is set (or ``max_frames`` slots), pacing unpaced sinks on the
        clock when ``realtime``; a slot started more than a slot late counts as ``late_slots``.
        ``on_step(now_s)`` is called after every slot (the command's terminal line).
        """
        period = 1.0 / self.frame_rate_hz
        due = self._clock()
        slots = 0
        while not stop.is_set() and (max_frames is None or slots < max_frames):
            now = self._clock()
            if realtime and not self.sink.paced:
                if due - now > 0 and stop.wait(due - now):
                    break
                now = self._clock()
                if now - due > period:
                    self.counters["late_slots"] += 1
                    due = now
                due += period
            sent = self.step(now)
            slots += 1
            if on_step is not None:
                on_step(now)
            if not sent and self.sink.paced and realtime:
                stop.wait(period)  # silent: no device buffer paces the loop
        self.state = TxState.STOPPED

    def close(self) -> None:
        """Silence and close the sink, then the follower and the status socket. Idempotent."""
        if self._closed:
            return
        self._closed = True
        self.state = TxState.STOPPED
        try:
            self.sink.close()
        finally:
            try:
                if self.status_publisher is not None:
                    self.status_publisher.publish(self.status(self._clock()))
                    self.status_publisher.close()
            finally:
                self.follower.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc) -> None:
        self.close()

