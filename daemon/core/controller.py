"""The link controller: one estimate (or one tick of time) in, a step with the new maps out.

:class:`LinkController` is the per-estimate decision path of the daemon with nothing around it:
the estimator, change control, the tone-plan check, staleness and the fallback map, sequence
numbers, the effective frame and the counters an operator reads. It has no sockets, threads,
files, clock or logging; time comes in as ``now_s`` on every call. The daemon's service wraps
it with I/O (it sends the maps of each :class:`Step`, records them and logs them); replay,
the simulator's closed loop and offline what-if runs can call the same object directly, and
the same inputs then give the same maps, byte for byte once encoded.

Rules, per call
---------------
:meth:`LinkController.on_estimate` (an estimate arrived at ``now_s``):

1. ``now_s`` is raised to the time of the last fallback map if it is earlier (a fallback sent
   on extrapolated time while a source was silent must not be followed by earlier times).
2. The estimate is counted as received; ``last_frame`` follows its ``frame``. An estimate of
   another tone plan (plan id or tone indices differ) is rejected as ``other_plan``.
3. A gap in the caller's time of at least ``stale_after_s`` since the newest accepted estimate
   means the link was stale during the gap: the fallback map goes first, dated when a live
   daemon would have sent it (newest accepted time + ``stale_after_s``).
4. The estimator judges the estimate (a rejection is counted by its reason); change control
   decides on the tracked view; a decision other than keep becomes a map.
5. A rejected estimate still checks staleness at ``now_s``.

:meth:`LinkController.on_tick` (time passed without an estimate) only checks staleness. Silence
counts from the newest accepted estimate; before the first, from the first estimate received
(whose time opens the source's time base), or, while none has been received, from ``start_s``.

Outer margin loop
-----------------
With ``outer`` (an :class:`~brimline.daemon.core.outer.OuterLoop`), :meth:`on_outcome` feeds
it the receiver's frame outcomes, and change control receives the loop's offset at ``now_s``
with every tracked view (``decide(tracked, now_s, offset_db=...)``) and lowers the effective
SNR by it: the same as loading with the gap raised by the offset. A rise of the offset is a
common-mode fall of the band (one reload per ``change.common_drop_db``); a fall of the offset
by as much is one reload at once, without the upgrade's dwell (the offset is no noisy
estimate). Each map's ``gap_db`` carries the gap plus the offset
it was made with (the fallback map carries the plain gap). Outcomes of another epoch, or with
a frame number that does not increase, are dropped and counted.

Lead measured from acknowledgements
-----------------------------------
A map names the frame it takes effect at: the newest frame seen plus the lead. ``lead_frames``
is the configured lead, the one used while nothing is known about the follower. A follower
acknowledges each map with the frame at which it came into force (:meth:`on_ack`); a map in
force later than the frame it named arrived late. The lead in use (:attr:`lead_in_use`) then
follows the evidence: a late map raises it at once by its lateness (never above
``lead_frames``) and doubles the run of on-time maps the next probe waits for; that run of maps
in a row in force at their frame (:data:`ON_TIME_ACKS` at first) lowers it by one (never below
1). A probe risks one map a frame or two late, which costs nothing but time (frames name the map
they carry), and a follower that needs a longer lead is probed ever more rarely. Acknowledgements carry no follower name, so with several
followers the slowest one's late maps hold the lead up. The fallback map (a link gone stale)
returns the lead to ``lead_frames``: whoever follows next has not been measured.

Sequence numbers and the lease
------------------------------
Every map gets ``next_seq``, which then grows by one, so seqs are strictly increasing. A caller
that must make each seq durable before it is sent (the daemon's state file) passes ``reserve``:
it is called with the seq before the map is made and raises a
:class:`~brimline.daemon.errors.BrimlineError` when the seq cannot be covered. The map is then
held back (not made, not counted as published, the seq not used); :attr:`state_unsaved` is true
until a later reserve succeeds. Without ``reserve`` every seq is publishable.
"""

from __future__ import annotations

import collections
import math
from dataclasses import dataclass
from typing import Callable

import numpy as np

from brimline.daemon.errors import BrimlineError
from brimline.daemon.records import (
    Allocation,
    DecisionKind,
    Estimate,
    FrameOutcome,
    LoadMap,
    TonePlan,
    Tracked,
)

__all__ = ["Change", "Step", "LinkController", "REJECTED", "ON_TIME_ACKS"]

#: ``Step.kind`` of an estimate that was not used (its reason names the counter).
REJECTED = "rejected"

#: Maps acknowledged in a row at the frame they named before the lead in use is first lowered
#: by one frame (see "Lead measured from acknowledgements"); doubled after each late map.
ON_TIME_ACKS = 3
_MAX_ON_TIME_ACKS = 1024

_LEADS_KEPT = 64  # maps whose effective frame and lead are kept for their acknowledgement
# each decision kind's value (a dict lookup per estimate instead of the enum's value property)
_KIND_TEXT = {k: k.value for k in DecisionKind}


@dataclass(frozen=True)
class Change:
    """One published map, as remembered for the status history and recorded as a decision.

    Attributes
    ----------
    time_s : float
        Controller time of the change, s.
    kind : str
        Decision kind (bit_swap, reload, emergency, fallback, restored).
    reason : str
        Why (change control's words).
    seq : int
        Sequence number of the published map.
    cause : str
        The rule that made it (change control's ``Decision.cause``; ``fallback`` for the
        fallback map).
    bits_before : int or None
        Bits per symbol of the map it replaced (None for the first map of a run).
    bits_after : int or None
        Bits per symbol of the new map.
    """

    time_s: float
    kind: str
    reason: str
    seq: int
    cause: str = ""
    bits_before: int | None = None
    bits_after: int | None = None


@dataclass(frozen=True)
class Step:
    """What one call of the controller decided.

    Attributes
    ----------
    now_s : float
        The time the controller used (the caller's, raised to the last fallback time).
    kind : str
        ``"keep"``, ``"bit_swap"``, ``"reload"``, ``"emergency"`` or ``"fallback"`` (a
        :class:`~brimline.daemon.records.DecisionKind` value), or :data:`REJECTED` for an
        estimate that was not used.
    reason : str
        Change control's reason, the rejection counter's name, or why nothing happened.
    maps : tuple of LoadMap
        The new maps, in the order they must be sent (a fallback may precede a normal map).
    changes : tuple of Change
        One per map, same order: kind, reason, time and seq.
    held_back : str or None
        When a decision called for a map but its seq could not be reserved (so no map was
        made and the seq stays unused): the reserve error's text.
    cause : str
        The rule behind the step, one short key for machines: change control's
        ``Decision.cause`` for a decision (keeps included: the counter it was counted under),
        the rejection counter's name for a rejected estimate (as ``reason``), ``fallback``
        when :meth:`LinkController.on_tick` entered the fallback map, ``stale`` or ``fresh``
        for another tick, and empty when nothing was decided (no tracked view yet).
    """

    now_s: float
    kind: str
    reason: str
    maps: tuple[LoadMap, ...] = ()
    changes: tuple[Change, ...] = ()
    held_back: str | None = None
    cause: str = ""

    @property
    def last_map(self) -> LoadMap | None:
        """The newest map of this step (None when there is none)."""
        return self.maps[-1] if self.maps else None


class LinkController:
    """Estimates in, load maps out: the daemon's decision path without I/O.

    Parameters
    ----------
    plan : TonePlan
        The tone plan maps are made for; estimates of other plans are rejected.
    estimator : Estimator
        Tracks the channel (``update(estimate, now_s)``, ``tracked(now_s)``, ``reset(why)``,
        ``counters``).
    change : ChangeControl
        Decides map changes (``decide(tracked, now_s)``, ``force(allocation, kind, reason,
        now_s)``). Public attribute: a test or tool may replace it before the first estimate.
    gap_db : float
        SNR gap the loader uses, dB (carried by every map, plus the outer loop's offset in
        force when the map was made).
    epoch : str
        Epoch id carried by every map.
    next_seq : int
        Sequence number of the first new map (>= 0).
    restored : LoadMap or None
        A map in force from an earlier run (kind ``restored``); it must be for ``plan``.
    lead_frames : int
        Frames between the newest received frame and the frame a new map applies from, until
        acknowledgements (:meth:`on_ack`) show a shorter lead is met; never exceeded.
    stale_after_s : float
        Time without an accepted estimate after which the fallback map is sent, s.
    fallback_bits : int
        Bits on every data tone of the fallback map.
    fallback_power_db : float
        Power on every data tone of the fallback map, relative to nominal, dB.
    reserve : callable, optional
        ``reserve(seq)`` makes ``seq`` publishable or raises ``BrimlineError`` (see the module
        docstring). None: every seq is publishable.
    start_s : float, optional
        Time the link came up (silence before the first estimate counts from it). By default
        the time of the first call.
    history : int
        Changes kept in :attr:`changes`.
    outer : OuterLoop, optional
        The outer margin loop (:class:`brimline.daemon.core.outer.OuterLoop`), fed by
        :meth:`on_outcome`; its offset is added to the gap every map is loaded with. None: no
        outer loop.

    Notes
    -----
    Deterministic: the same constructor arguments and the same sequence of calls (estimates
    and times) give the same steps and maps.
    """

    def __init__(self, plan: TonePlan, estimator, change, *, gap_db: float, epoch: str,
                 next_seq: int = 0, restored: LoadMap | None = None, lead_frames: int = 2,
                 stale_after_s: float = 1.0, fallback_bits: int = 2,
                 fallback_power_db: float = 0.0,
                 reserve: Callable[[int], None] | None = None, start_s: float | None = None,
                 history: int = 16, outer=None) -> None:
        if next_seq < 0:
            raise ValueError(f"next_seq={next_seq} must be >= 0")
        if restored is not None and restored.plan_id != plan.plan_id:
            raise ValueError(f"restored map is for tone plan {restored.plan_id}, "
                             f"not {plan.plan_id}")
        self.plan = plan
        self.estimator = estimator
        self.change = change
        self.outer = outer
        self.outcomes_dropped: collections.Counter[str] = collections.Counter()  # by reason
        self._offset_db = 0.0
        self.epoch = str(epoch)
        self.next_seq = int(next_seq)
        self.lead_frames = int(lead_frames)
        self.lead_in_use = self.lead_frames  #: the lead new maps get (see :meth:`on_ack`)
        self.acks_late = 0  #: acknowledged maps that came into force after their frame
        self._on_time = 0  # maps in a row acknowledged at their frame
        self._probe_after = ON_TIME_ACKS  # ... that lower the lead by one
        # seq -> (effective frame, lead it was made with), for the acknowledgements
        self._leads: collections.OrderedDict[int, tuple[int, int]] = collections.OrderedDict()
        self.stale_after_s = float(stale_after_s)
        self._gap_db = float(gap_db)
        self._reserve = reserve
        self._plan_id = plan.plan_id  # a hash: computed once, compared per estimate
        # The plan's data tones as the bytes an Estimate's int16 tone_index must equal: one
        # memcmp per estimate instead of an elementwise comparison.
        self._tone_bytes = np.asarray(plan.data_tones, dtype=np.int16).tobytes()
        n = plan.data_tones.size
        p_lin = 10.0 ** (float(fallback_power_db) / 10.0)
        self._fallback = Allocation(bits=np.full(n, int(fallback_bits)),
                                    power=np.full(n, p_lin), total_bits=n * int(fallback_bits),
                                    total_power=n * p_lin, margin_db=math.nan)
        self._fallback_reason = (f"no valid estimate for {self.stale_after_s:g} s: safe map "
                                 f"({int(fallback_bits)} bits, {float(fallback_power_db):+g} dB "
                                 f"on every tone)")

        self.current_map: LoadMap | None = restored
        self.current_kind: str | None = None if restored is None else "restored"
        self.maps_published: collections.Counter[str] = collections.Counter()
        self.changes: collections.deque[Change] = collections.deque(maxlen=int(history))
        self.rejected: collections.Counter[str] = collections.Counter()  # by reason
        self.received = 0
        self.accepted = 0
        self.decode_errors = 0
        self.last_frame = -1
        self.held_back = 0  #: maps not made because their seq could not be reserved
        self.state_unsaved = False  #: the last reserve failed
        self.fallback_active = False
        self.stale = False
        self.last_tracked: Tracked | None = None
        self.last_valid_s: float | None = None  #: time of the newest accepted estimate
        self._quiet_from_s = None if start_s is None else float(start_s)
        self._floor_s = -math.inf

    # ------------------------------------------------------------------ calls

    def on_estimate(self, estimate: Estimate, now_s: float) -> Step:
        """Take one estimate received at ``now_s``; return what was decided.

        Parameters
        ----------
        estimate : Estimate
            The estimate (of any plan; others are rejected and counted).
        now_s : float
            The caller's time for it, s (the estimate's own time for a replayed or simulated
            source, the arrival time for a live one).

        Returns
        -------
        Step
        """
        now_s = max(float(now_s), self._floor_s)
        if self.received == 0:  # the first estimate opens the source's time base
            self._quiet_from_s = now_s
        self.received += 1
        self.last_frame = max(self.last_frame, estimate.frame)
        maps: list[LoadMap] = []
        changes: list[Change] = []
        held: list[str] = []
        if (estimate.plan_id != self._plan_id
                or estimate.tone_index.tobytes() != self._tone_bytes):
            # Received with another tone plan: no map of this controller could describe it.
            self.rejected["other_plan"] += 1
            return self._rejected("other_plan", now_s, maps, changes, held)
        if (self.last_valid_s is not None and not self.fallback_active
                and now_s - self.last_valid_s >= self.stale_after_s):
            self._enter_fallback(self.last_valid_s + self.stale_after_s, maps, changes, held)
        reason = self.estimator.update(estimate, now_s)
        if reason is not None:
            self.rejected[reason] += 1
            return self._rejected(reason, now_s, maps, changes, held)
        self.accepted += 1
        self.last_valid_s = now_s
        self.stale = False
        tracked = self.estimator.tracked(now_s)
        if tracked is None:
            return self._step(now_s, "keep", "no tracked view yet", maps, changes, held)
        self.last_tracked = tracked
        if self.outer is not None:
            # The outer loop's offset raises the gap: change control lowers every tone's
            # effective SNR by it (a common-mode change of the band).
            self._offset_db = self.outer.offset_db(now_s)
            decision = self.change.decide(tracked, now_s, offset_db=self._offset_db)
        else:
            decision = self.change.decide(tracked, now_s)
        kind = _KIND_TEXT[decision.kind]
        if decision.kind is not DecisionKind.KEEP:
            self._make_map(decision.allocation, kind, decision.reason, now_s, False,
                           maps, changes, held, cause=decision.cause)
        return self._step(now_s, kind, decision.reason, maps, changes, held, decision.cause)

    def on_tick(self, now_s: float) -> Step:
        """Time passed without an estimate: send the fallback map once the link is stale.

        Parameters
        ----------
        now_s : float
            The caller's time now, s (same time base as :meth:`on_estimate`).

        Returns
        -------
        Step
            ``kind`` ``"fallback"`` with the fallback map when it was entered now, else
            ``"keep"``.
        """
        now_s = max(float(now_s), self._floor_s)
        if self._quiet_from_s is None:
            self._quiet_from_s = now_s
        maps: list[LoadMap] = []
        changes: list[Change] = []
        held: list[str] = []
        entered = self._check_stale(now_s, maps, changes, held)
        if entered:
            return self._step(now_s, DecisionKind.FALLBACK.value, self._fallback_reason, maps,
                              changes, held, DecisionKind.FALLBACK.value)
        quiet = "stale" if self.stale else "fresh"
        return self._step(now_s, "keep", quiet, maps, changes, held, quiet)

    def on_outcome(self, outcome: FrameOutcome, now_s: float) -> bool:
        """Take one frame outcome reported by the receiver side (for the outer loop).

        An outcome of another epoch, one arriving with no outer loop configured, or one whose
        frame number does not increase is dropped and counted in :attr:`outcomes_dropped`
        (``other_epoch``, ``no_outer_loop``, ``repeated``).

        Parameters
        ----------
        outcome : FrameOutcome
            The receiver's report.
        now_s : float
            The caller's time when it arrived, s.

        Returns
        -------
        bool
            Whether the outer loop took it.
        """
        if self.outer is None:
            self.outcomes_dropped["no_outer_loop"] += 1
            return False
        if outcome.epoch != self.epoch:
            self.outcomes_dropped["other_epoch"] += 1
            return False
        if not self.outer.record(outcome.errored, outcome.frame, now_s):
            self.outcomes_dropped["repeated"] += 1
            return False
        return True

    def on_ack(self, seq: int, frame: int) -> bool:
        """Take a follower's acknowledgement: map ``seq`` came into force at ``frame``.

        Adjusts :attr:`lead_in_use` (see the module docstring): a map in force after the frame
        it named raises the lead by its lateness, up to ``lead_frames``, and doubles the run of
        on-time maps (:data:`ON_TIME_ACKS` at first) that lowers it by one, down to 1.

        Parameters
        ----------
        seq : int
            Sequence number of the acknowledged map.
        frame : int
            The follower's frame counter at which it came into force.

        Returns
        -------
        bool
            False for a map this controller does not remember (another run's, a fallback
            map, or one long gone), which changes nothing.
        """
        known = self._leads.pop(int(seq), None)
        if known is None:
            return False
        effective, lead = known
        late = int(frame) - effective
        if late > 0:
            self.acks_late += 1
            self._on_time = 0
            self.lead_in_use = max(self.lead_in_use, min(self.lead_frames, lead + late))
            self._probe_after = min(2 * self._probe_after, _MAX_ON_TIME_ACKS)
            return True
        self._on_time += 1
        if self._on_time >= self._probe_after and self.lead_in_use > 1:
            self.lead_in_use -= 1
            self._on_time = 0
        return True

    def count_bad_outcome(self) -> None:
        """Count a feedback message the caller could not decode (``outcomes_dropped``,
        reason ``undecodable``)."""
        self.outcomes_dropped["undecodable"] += 1

    def outer_status(self, now_s: float) -> dict | None:
        """The outer loop's status fields at ``now_s`` plus ``dropped`` by reason (None
        without an outer loop)."""
        if self.outer is None:
            return None
        return {**self.outer.status(now_s), "dropped": dict(self.outcomes_dropped)}

    def count_undecodable(self) -> None:
        """Count an estimate the caller could not decode (status ``decode_errors``)."""
        self.decode_errors += 1

    def estimate_age_s(self, now_s: float) -> float | None:
        """Age of the newest accepted estimate at ``now_s``, s (None before the first)."""
        return None if self.last_valid_s is None else max(0.0, now_s - self.last_valid_s)

    @property
    def frames(self) -> dict[str, int]:
        """The frame counters: ``received``, ``accepted``, ``decode_errors``, ``last_frame``."""
        return {"received": self.received, "accepted": self.accepted,
                "decode_errors": self.decode_errors, "last_frame": self.last_frame}

    # ------------------------------------------------------------------ rules

    def _rejected(self, reason, now_s, maps, changes, held) -> Step:
        self._check_stale(now_s, maps, changes, held)
        return self._step(now_s, REJECTED, reason, maps, changes, held, reason)

    def _check_stale(self, now_s, maps, changes, held) -> bool:
        start = self.last_valid_s if self.last_valid_s is not None else self._quiet_from_s
        if now_s - start < self.stale_after_s:
            return False
        self.stale = True
        if self.fallback_active:
            return False
        self._enter_fallback(now_s, maps, changes, held)
        return True

    def _enter_fallback(self, now_s, maps, changes, held) -> None:
        self._floor_s = max(self._floor_s, now_s)
        # whoever follows next has not been measured
        self.lead_in_use, self._on_time, self._probe_after = self.lead_frames, 0, ON_TIME_ACKS
        self.change.force(self._fallback, DecisionKind.FALLBACK, self._fallback_reason, now_s)
        self.estimator.reset("stale")
        self.fallback_active = True
        self.stale = True
        self._make_map(self._fallback, DecisionKind.FALLBACK.value, self._fallback_reason,
                       now_s, True, maps, changes, held, cause=DecisionKind.FALLBACK.value)

    def _make_map(self, alloc: Allocation, kind: str, reason: str, now_s: float,
                  fallback: bool, maps, changes, held, *, cause: str) -> None:
        if self._reserve is not None:
            try:
                self._reserve(self.next_seq)
            except BrimlineError as exc:
                # No durable cover for this seq: the map is held back, so no seq is reused.
                self.held_back += 1
                self.state_unsaved = True
                held.append(str(exc))
                return
        self.state_unsaved = False
        # The record converts and freezes the loader's arrays once.
        m = LoadMap(epoch=self.epoch, seq=self.next_seq,
                    effective_frame=self.last_frame + self.lead_in_use, created_s=now_s,
                    plan_id=self._plan_id, tone_index=self.plan.data_tones, bits=alloc.bits,
                    power_lin=alloc.power, total_bits=alloc.total_bits,
                    margin_db=alloc.margin_db, gap_db=self._gap_db + (
                        0.0 if fallback else self._offset_db), reason=reason,
                    fallback=fallback)
        self.next_seq += 1
        if not fallback:
            self._leads[m.seq] = (m.effective_frame, self.lead_in_use)
            while len(self._leads) > _LEADS_KEPT:
                self._leads.popitem(last=False)
        if self.fallback_active and not fallback:
            self.fallback_active = False
        before = None if self.current_map is None else self.current_map.total_bits
        self.current_map, self.current_kind = m, kind
        self.maps_published[kind] += 1
        change = Change(now_s, kind, reason, m.seq, cause=cause, bits_before=before,
                        bits_after=m.total_bits)
        self.changes.append(change)
        maps.append(m)
        changes.append(change)

    @staticmethod
    def _step(now_s, kind, reason, maps, changes, held, cause="") -> Step:
        return Step(now_s=now_s, kind=kind, reason=reason, maps=tuple(maps),
                    changes=tuple(changes), held_back=held[0] if held else None, cause=cause)
