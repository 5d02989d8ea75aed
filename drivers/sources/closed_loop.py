"""Closed-loop runs of the simulated link, and the baselines adaptive loading is measured against.

:func:`run_closed_loop` runs a :class:`~brimline.drivers.sources.sim.SimDriver` for N frames
with one of three kinds of map, and returns what the link delivered (:class:`LoopFigures`:
goodput, frame and bit error rate, maps per minute):

* **adaptive**: a :class:`~brimline.daemon.core.controller.LinkController` gets each estimate
  with ``now_s`` the estimate's time (a dropped frame is a tick at its time); its maps go into a
  :class:`~brimline.drivers.link.schedule.MapSchedule`, so each map is in force from the effective
  frame it names (the controller's lead after the newest frame it had seen). Each map is
  acknowledged at the frame it came into force, as a follower would, so the controller's lead
  comes down to what this transmitter meets (one frame); with an outer margin loop, each frame
  sent with a map is reported with its payload check before the frame's estimate, as the
  receiver side would. No sockets, no threads, no clock: a seed gives the same run on every
  machine.
* **oracle** (:class:`OracleMaps`): the same loader on the simulator's true per-tone SNR of
  the very frame being sent (no estimation noise, no delay): an upper bound for any adaptive
  scheme with that loader and target; :func:`best_oracle` adds the least margin with which it
  meets the target frame error rate on the same realisation (the receiver does not deliver the
  true SNR: see :mod:`brimline.drivers.link.receiver`).
* **fixed** (:class:`FixedMaps`): one constellation on every data tone at nominal (flat) power,
  the non-adaptive link; :func:`best_fixed` searches the bit counts on the same channel
  realisation for the one with the most goodput that meets a target frame error rate.

"The same channel realisation": the simulator draws its fading taps, fades and interferer from
its seed at construction, so runs built with the same arguments see the same channel; noise and
payload come from the same generator and differ only where the maps' payload draws differ.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Iterable

import numpy as np

from brimline.daemon.core.controller import LinkController
from brimline.daemon.records import Allocation, FrameOutcome, LoadMap, TonePlan
from brimline.drivers.link.schedule import MapSchedule
from brimline.drivers.sources.sim import SimDriver

__all__ = ["LoopFigures", "OracleMaps", "FixedMaps", "run_closed_loop", "best_fixed",
           "best_oracle", "frame_ser_target"]


@dataclass(frozen=True)
class LoopFigures:
    """What a closed-loop run delivered.

    Attributes
    ----------
    goodput_bps : float
        Data bits of frames delivered (decoded, payload CRC passed) per second of link time.
    frame_error_rate : float
        Frames with a payload not delivered / frames with a payload (NaN without any).
    bit_error_rate : float
        Wrong payload bits / payload bits demodulated (NaN without any).
    maps_per_min : float
        Maps brought into force per minute of link time (the first included).
    frames : int
        Frames sent.
    delivered : ndarray of bool
        Per frame sent: its payload was delivered.
    sent_seq : ndarray of int64
        Per frame sent: the sequence number of the map it was sent with (-1: the default map).
    """

    goodput_bps: float
    frame_error_rate: float
    bit_error_rate: float
    maps_per_min: float
    frames: int
    delivered: np.ndarray
    sent_seq: np.ndarray


def frame_ser_target(target_fer: float, symbols_per_frame: int) -> float:
    """Per-symbol error rate that gives ``target_fer`` for a frame of independent symbols:
    ``1 - (1 - target_fer) ** (1 / symbols_per_frame)`` (any symbol error loses the frame)."""
    return float(-np.expm1(np.log1p(-float(target_fer)) / int(symbols_per_frame)))


def _map(plan: TonePlan, seq: int, frame: int, alloc: Allocation, gap_db: float,
         reason: str) -> LoadMap:
    return LoadMap(epoch="baseline", seq=seq, effective_frame=frame, created_s=0.0,
                   plan_id=plan.plan_id, tone_index=plan.data_tones, bits=alloc.bits,
                   power_lin=alloc.power, total_bits=alloc.total_bits,
                   margin_db=alloc.margin_db, gap_db=gap_db, reason=reason)


class OracleMaps:
    """Map provider: the loader on the true per-tone SNR of the frame about to be sent.

    Parameters
    ----------
    sim : SimDriver
        The simulator whose truth (:meth:`SimDriver.truth`) is loaded.
    loader : callable
        ``loader(snr_lin) -> Allocation`` (a :class:`~brimline.daemon.core.loading.Loader`);
        its ``gap_db`` is written into the maps when it has one.

    Notes
    -----
    A new sequence number is used only when the allocation changes, so ``maps_per_min`` counts
    real changes and the receiver's map tables are reused.
    """

    def __init__(self, sim: SimDriver, loader: Callable[[np.ndarray], Allocation]) -> None:
        self._sim = sim
        self._loader = loader
        self._gap_db = float(getattr(loader, "gap_db", 0.0))
        self._current: LoadMap | None = None

    def __call__(self, frame: int) -> LoadMap:
        alloc = self._loader(10.0 ** (self._sim.truth(frame).snr_db / 10.0))
        m = self._current
        if m is None or not (np.array_equal(m.bits, alloc.bits) and np.array_equal(
                m.power_lin, alloc.power.astype(np.float32))):
            seq = 0 if m is None else m.seq + 1
            self._current = _map(self._sim.plan, seq, frame, alloc, self._gap_db,
                                 "oracle: loader on the true SNR")
        return self._current


class FixedMaps:
    """Map provider: ``bits`` on every data tone at nominal power, for every frame.

    Parameters
    ----------
    plan : TonePlan
        The tone plan.
    bits : int
        Bits on every data tone (0 .. the link's ``max_bits``).
    """

    def __init__(self, plan: TonePlan, bits: int) -> None:
        n = plan.data_tones.size
        alloc = Allocation(bits=np.full(n, int(bits)), power=np.full(n, float(bits > 0)),
                           total_bits=n * int(bits), total_power=float(n * (bits > 0)),
                           margin_db=np.nan)
        self.bits = int(bits)
        self.map = _map(plan, 0, 0, alloc, np.nan, f"fixed: {int(bits)} bits, flat power")

    def __call__(self, frame: int) -> LoadMap:
        return self.map


def run_closed_loop(sim: SimDriver, n_frames: int, *,
                    controller: LinkController | None = None,
                    provider: Callable[[int], LoadMap | None] | None = None,
                    stop_after_errors: int | None = None) -> LoopFigures:
    """Run ``sim`` for ``n_frames`` frames in closed loop and count what it delivered.

    Parameters
    ----------
    sim : SimDriver
        A fresh simulator (its ``map_provider`` is replaced); not real-time.
    n_frames : int
        Frames to send.
    controller : LinkController, optional
        Adaptive loading: each estimate goes to ``controller.on_estimate(estimate,
        estimate.time_s)`` (a frame without estimate to ``on_tick`` at its time); each map
        published is in force from its effective frame and is acknowledged
        (``on_ack``) at the frame it came into force, so the controller's lead follows what
        the transmitter meets. With an outer loop
        (``controller.outer``), every frame sent with one of its maps is reported first, as
        the receiver side would: ``on_outcome`` with the frame's payload check (a frame lost
        altogether counts as errored).
    provider : callable, optional
        Otherwise: ``provider(frame) -> LoadMap`` (an :class:`OracleMaps`, a
        :class:`FixedMaps`); neither gives the default map throughout.
    stop_after_errors : int, optional
        Stop early once more frames than this were not delivered (a search that only needs
        to know the target is missed); the figures are then over the frames sent.

    Returns
    -------
    LoopFigures
    """
    if controller is not None and provider is not None:
        raise ValueError("give a controller or a provider, not both")
    schedule = MapSchedule()
    if controller is not None:
        sim.map_provider = schedule
    else:
        sim.map_provider = provider
    n = int(n_frames)
    delivered = np.zeros(n, bool)
    sent_seq = np.full(n, -1, np.int64)
    for k in range(n):
        i = sim.next_frame
        est = sim.step()
        delivered[k] = sim.last_delivered
        sent_seq[k] = sim.last_seq
        if stop_after_errors is not None and sim.link.frames - sim.link.frames_ok > \
                stop_after_errors:
            n = k + 1
            break
        if controller is not None:
            now_s = sim.start_s + sim.frame_time_s(i)
            if sent_seq[k] >= 0 and (k == 0 or sent_seq[k] != sent_seq[k - 1]):
                # the transmitter acknowledges a map at the frame it came into force
                controller.on_ack(int(sent_seq[k]), i)
            if controller.outer is not None and sent_seq[k] >= 0:
                # The receiver reports the frame's outcome with its estimate (before it, so
                # the decision on this estimate sees the offset it moved).
                controller.on_outcome(FrameOutcome(controller.epoch, int(sent_seq[k]), i,
                                                   not delivered[k], now_s), now_s)
            step = (controller.on_tick(now_s) if est is None
                    else controller.on_estimate(est, est.time_s))
            for m in step.maps:
                schedule.schedule(m)
    delivered, sent_seq = delivered[:n], sent_seq[:n]
    applied = np.count_nonzero(np.diff(sent_seq) != 0) + int(n > 0 and sent_seq[0] >= 0)
    link = sim.link.summary()
    minutes = link["link_time_s"] / 60.0
    return LoopFigures(
        goodput_bps=float(link["goodput_bps"] or 0.0),
        frame_error_rate=np.nan if link["frame_error_rate"] is None
        else float(link["frame_error_rate"]),
        bit_error_rate=np.nan if link["bit_error_rate"] is None
        else float(link["bit_error_rate"]),
        maps_per_min=(applied / minutes) if minutes > 0 else 0.0,
        frames=n, delivered=delivered, sent_seq=sent_seq)


def best_fixed(make_sim: Callable[[], SimDriver], n_frames: int, target_fer: float,
               bits: Iterable[int]) -> tuple[int | None, LoopFigures | None]:
    """The fixed constellation with the most goodput whose frame error rate meets the target.

    Parameters
    ----------
    make_sim : callable
        Makes a fresh simulator of the scenario (same arguments, same seed: the same channel
        realisation for every candidate).
    n_frames : int
        Frames per candidate.
    target_fer : float
        Largest acceptable frame error rate.
    bits : iterable of int
        Candidate bit counts (0 is skipped).

    Returns
    -------
    tuple
        ``(bits, figures)`` of the best candidate, or ``(None, None)`` when none meets the
        target.
    """
    best: tuple[int | None, LoopFigures | None] = (None, None)
    limit = int(target_fer * n_frames)
    for b in sorted({int(b) for b in bits if int(b) > 0}):
        with make_sim() as sim:
            fig = run_closed_loop(sim, n_frames, provider=FixedMaps(sim.plan, b),
                                  stop_after_errors=limit)
        if fig.frame_error_rate <= target_fer and (best[1] is None
                                                   or fig.goodput_bps > best[1].goodput_bps):
            best = (b, fig)
    return best


def best_oracle(make_sim: Callable[[], SimDriver], make_loader: Callable[[float], Callable],
                n_frames: int, target_fer: float,
                extra_margins_db: Iterable[float] = np.arange(0.0, 8.01, 0.5),
                ) -> tuple[float | None, LoopFigures | None]:
    """The oracle with the least extra margin whose frame error rate meets the target.

    The oracle loads the true SNR, which is not what the receiver delivers: channel and noise
    are estimated from one frame, and timing, frequency and phase corrections are not perfect.
    So, like :func:`best_fixed`, the oracle is searched on the same realisation: extra margins
    in increasing order until one meets ``target_fer`` (a smaller margin gives more bits).

    Parameters
    ----------
    make_sim : callable
        Makes a fresh simulator of the scenario.
    make_loader : callable
        ``make_loader(extra_margin_db)`` gives the loader with that much margin added to the
        adaptive link's settings.
    n_frames : int
        Frames per candidate.
    target_fer : float
        Largest acceptable frame error rate.
    extra_margins_db : iterable of float
        Candidates, dB.

    Returns
    -------
    tuple
        ``(extra_margin_db, figures)`` of the first candidate that meets the target, or
        ``(None, None)``.
    """
    limit = int(target_fer * n_frames)
    for extra in sorted(float(m) for m in extra_margins_db):
        with make_sim() as sim:
            fig = run_closed_loop(sim, n_frames, provider=OracleMaps(sim, make_loader(extra)),
                                  stop_after_errors=limit)
        if fig.frames == n_frames and fig.frame_error_rate <= target_fer:
            return extra, fig
    return None, None
