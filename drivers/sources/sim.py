"""Simulated link: transmitter -> channel -> receiver, one :class:`Estimate` per frame.

The simulator runs the same transmitter and receiver DSP as the radio path, through the channel
simulator of :mod:`brimline.drivers.air.channel`. Frame ``i`` is sent at simulated time
``i / frame_rate_hz`` (fading continues between frames); its estimate carries
``time_s = start_s + i / frame_rate_hz``. With ``realtime`` the driver sleeps until each frame's
due time on the monotonic clock (waking at once on ``close()``); without it frames come as fast as
the DSP runs.

Closed-loop accounting: every frame's payload ends in a CRC-32 (see
:mod:`brimline.drivers.link.frame`); the receiver decodes the data with the map its header
names, and :attr:`SimDriver.link` (a :class:`~brimline.drivers.link.receiver.LinkTally`) counts
bit errors, frame errors and goodput per second of link time. The service puts its summary in
the status message's ``link`` block.

Maps: the map provider is asked, before each frame, for the map to send with frame ``i``
(``map_provider(i)``). The live daemon's provider hands over whatever its follower holds; the
lockstep one (fast mode) and the baselines of :mod:`brimline.drivers.sources.baselines` return
the map in force at frame ``i``, so a seeded run is the same on every machine.
"""

from __future__ import annotations

import collections
import math
import time
from typing import Iterator

import numpy as np

from brimline.daemon.errors import ConfigError
from brimline.daemon.records import Estimate, TonePlan
from brimline.drivers.air.channel import FadeEvent, LinkChannel, Truth, check_interferer_window
from brimline.drivers.air.channel import profile as _profile
from brimline.drivers.link.frame import Transmitter, as_link_plan, bit_errors, map_arrays
from brimline.drivers.link.receiver import LinkTally, Receiver
from brimline.drivers.sources.base import Driver, MapProvider

__all__ = ["SimDriver"]


class SimDriver(Driver):
    """Estimates from a simulated OFDM link.

    Parameters
    ----------
    plan : TonePlan
        Tone plan and frame layout (from ``ofdm.make_plan``).
    map_provider : callable, optional
        ``map_provider(frame_index)``, called once per frame for the map to transmit; None (or
        a None result) sends the default map of ``default_bits`` per tone.
    profile, doppler_hz, snr_db, cfo_hz, lead_max_samples, interferer_tone, interferer_db,
    interferer_start_s, interferer_stop_s, drift_db, drift_period_s : see :class:`~brimline.drivers.air.channel.LinkChannel`
    events : list of dict or FadeEvent
        Band fades (keys start_s, stop_s (None: never), first_tone, last_tone, depth_db).
    frame_rate_hz : float
        Frames per second of simulated time.
    realtime : bool
        Pace frames on the monotonic clock.
    start_s : float
        ``time_s`` of frame 0.
    seed : int
        Seed of the one random generator behind payload, fading, noise and timing.
    default_bits : int
        Bits per tone of the default map.
    max_frames : int or None
        Stop after this many frames.
    sync_threshold : float
        Receiver frame detection threshold.

    Attributes
    ----------
    counters : Counter
        "frames" (estimates yielded), receiver reasons ("no_sync", "truncated", "crc_failed",
        "clipped"), "map_rejected" (a map that does not fit the plan), and "bits" /
        "bit_errors" over data tones demodulated with the map the transmitter used.
    link : LinkTally
        Frame errors (payload CRC), bit errors and goodput of every frame sent.
    last_delivered : bool
        Whether the last frame's payload was delivered (decoded, CRC passed).
    last_seq : int
        Sequence number of the map the last frame was sent with (-1: the default map).
    """

    name = "sim"

    def __init__(self, *, plan: TonePlan, map_provider: MapProvider | None = None,
                 profile: str = "epa", doppler_hz: float = 5.0, snr_db: float = 25.0,
                 cfo_hz: float = 1500.0, lead_max_samples: int = 64,
                 interferer_tone: float | None = None, interferer_db: float = 0.0,
                 interferer_start_s: float | None = None,
                 interferer_stop_s: float | None = None, drift_db: float = 0.0, drift_period_s: float = 60.0, events=(),
                 frame_rate_hz: float = 50.0, realtime: bool = True, start_s: float = 0.0,
                 seed: int = 1, default_bits: int = 2, max_frames: int | None = None,
                 sync_threshold: float = 0.3) -> None:
        super().__init__()
        plan = as_link_plan(plan)
        try:
            _profile(profile)
        except ValueError as exc:
            raise ConfigError(f"driver.sim.{exc}") from None
        if not (frame_rate_hz > 0 and 1.0 / frame_rate_hz >= plan.frame_duration_s):
            raise ConfigError(
                f"driver.sim.frame_rate_hz={frame_rate_hz}: frames last "
                f"{plan.frame_duration_s * 1e3:.3f} ms, so at most "
                f"{1.0 / plan.frame_duration_s:.1f} frames per second fit")
        if not 0 <= default_bits <= plan.max_bits:
            raise ConfigError(f"driver.sim.default_bits={default_bits} must be in "
                              f"[0, link.max_bits={plan.max_bits}]")
        self.plan = plan
        self.map_provider = map_provider
        self.frame_rate_hz = float(frame_rate_hz)
        self.realtime = bool(realtime)
        self.start_s = float(start_s)
        self.default_bits = int(default_bits)
        self.max_frames = max_frames
        self.rng = np.random.default_rng(seed)
        check_interferer_window(interferer_start_s, interferer_stop_s, prefix="driver.sim.",
                                error=ConfigError)
        fades = [e if isinstance(e, FadeEvent) else FadeEvent(
            start_s=e["start_s"], first_tone=e["first_tone"], last_tone=e["last_tone"],
            depth_db=e.get("depth_db", 20.0),
            stop_s=math.inf if e.get("stop_s") is None else e["stop_s"]) for e in events]
        self.channel = LinkChannel(
            plan, profile=profile, doppler_hz=doppler_hz, snr_db=snr_db, cfo_hz=cfo_hz,
            lead_max_samples=lead_max_samples, interferer_tone=interferer_tone,
            interferer_db=interferer_db, interferer_start_s=interferer_start_s,
            interferer_stop_s=interferer_stop_s, drift_db=drift_db, drift_period_s=drift_period_s,
            events=fades, rng=self.rng)
        self.transmitter = Transmitter(plan)
        self.receiver = Receiver(plan, default_bits=default_bits, sync_threshold=sync_threshold)
        self._sent: collections.OrderedDict[int, tuple] = collections.OrderedDict()
        self._index = 0
        self.link = LinkTally(1.0 / self.frame_rate_hz)
        self.last_delivered = False
        self.last_seq = -1

    @property
    def next_frame(self) -> int:
        """Index of the frame :meth:`step` sends next."""
        return self._index

    def frame_time_s(self, index: int) -> float:
        """Simulated time (channel clock, seconds) at which frame ``index`` is sent."""
        return index / self.frame_rate_hz

    def truth(self, index: int) -> Truth:
        """The true per-data-tone channel and SNR of frame ``index`` (for tests and benchmarks).

        Evaluated at the middle of the frame, the time the receiver's least-squares fit refers to.
        """
        return self.channel.truth(self.frame_time_s(index) + 0.5 * self.plan.frame_duration_s)

    def step(self) -> Estimate | None:
        """Send and receive the next frame; its Estimate, or None when it was dropped."""
        i = self._index
        self._index += 1
        load_map = self.map_provider(i) if self.map_provider is not None else None
        try:
            seq, bits, power = map_arrays(self.plan, load_map, self.default_bits)
            if bits.max(initial=0) > self.plan.max_bits:
                raise ValueError(f"map seq={seq} has more than {self.plan.max_bits} bits")
        except ValueError:
            self.counters["map_rejected"] += 1
            seq, bits, power = map_arrays(self.plan, None, self.default_bits)
        if seq >= 0:
            self._sent[seq] = (bits, power)
            self._sent.move_to_end(seq)
            while len(self._sent) > 32:
                self._sent.popitem(last=False)
        self.last_seq = seq
        t_s = self.frame_time_s(i)
        sent = self.transmitter.frame(bits=bits, power_lin=power, map_seq=seq, counter=i,
                                      rng=self.rng)
        block = self.channel.transmit(sent.samples, t_s, tail_samples=self.plan.symbol_len)
        res = self.receiver.receive(block, self._sent.get)
        if res.reason:
            self.counters[res.reason] += 1
        decoded = res.values is not None and res.map_seq == seq
        self.last_delivered = self.link.add(sent.values, bits, res.values if decoded else None)
        if not res.has_estimate:
            return None
        if decoded:
            self.counters["bits"] += int(bits.sum()) * self.plan.data_symbols
            self.counters["bit_errors"] += bit_errors(sent.values, res.values)
        self.counters["frames"] += 1
        return res.to_estimate(plan=self.plan, frame=i, time_s=self.start_s + t_s)

    def capture(self, n_frames: int, *, gap_samples: int = 0) -> np.ndarray:
        """Baseband samples of the next ``n_frames`` frames as a receiver would record them.

        Each frame is followed by ``gap_samples`` of noise; the channel still advances by
        ``1 / frame_rate_hz`` per frame, so a capture is short while the fading is realistic.
        Frames carry the default map (for recordings, which do not store maps).
        """
        seq, bits, power = map_arrays(self.plan, None, self.default_bits)
        pieces = []
        for _ in range(int(n_frames)):
            i = self._index
            self._index += 1
            sent = self.transmitter.frame(bits=bits, power_lin=power, map_seq=seq, counter=i,
                                          rng=self.rng)
            pieces.append(self.channel.transmit(sent.samples, self.frame_time_s(i),
                                                tail_samples=gap_samples))
        return np.concatenate(pieces) if pieces else np.zeros(0, np.complex64)

    def _frames(self) -> Iterator[Estimate]:
        t0 = time.monotonic() - self.frame_time_s(self._index)
        while not self.closed:
            if self.max_frames is not None and self._index >= self.max_frames:
                return
            if self.realtime:
                delay = t0 + self.frame_time_s(self._index) - time.monotonic()
                if delay > 0 and self._closed.wait(delay):
                    return
            est = self.step()
            if est is not None:
                yield est
