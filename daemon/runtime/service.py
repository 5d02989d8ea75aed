"""The daemon loop: I/O around the link controller (estimates in, maps and status out).

The decisions are :class:`~brimline.daemon.core.controller.LinkController`'s: this module
feeds it estimates and time, and does what its steps say (send the maps, save the seq lease and
the last map, record, log) plus the status stream and the pacing. Objects are built from the
config in :mod:`brimline.daemon.runtime.assemble`.

Threads and sockets
-------------------
Two threads own sockets, each its own (ZeroMQ sockets never cross threads); a third, socketless
one (:class:`~brimline.daemon.wire.state.StateKeeper`'s writer) saves the last map, so that fsync is
almost never on the loop:

* the **driver thread** (:class:`~brimline.daemon.runtime.handoff.DriverThread`) hands each
  estimate to the main thread; in real-time simulation its transmitter follows the published
  maps through a real :class:`Follower`
  (:class:`~brimline.daemon.runtime.assemble.FollowerMapProvider`).
  In **lockstep** (fast simulation) there is no driver thread: the main thread steps the
  simulator (:class:`~brimline.daemon.runtime.handoff.LockstepFeed`).
* the **main thread** owns every other socket (maps, snapshots, heartbeats, status,
  acknowledgements, the inproc receiving end) and waits on all of them with one ``zmq.Poller``
  whose timeout is the nearest deadline (heartbeat, status, staleness, the caller's stop time).
  One :meth:`Service.step` handles estimates only until the next heartbeat or status is due
  (it reads the clock every few estimates), so a flood of estimates cannot delay them.

Time model
----------
Which time the controller is given (the estimate's own, or the monotonic clock) is the
:class:`~brimline.daemon.runtime.timebase.Timebase`'s policy; heartbeats and the status period
always run on the monotonic clock.

``run(duration_s)`` counts **link time**, the controller's: from the first estimate's own time
with the source clock (a seeded simulation in lockstep thus stops after the same frames every
time: the frame due at the end is not simulated), from the start with the monotonic clock. A
source-clock source that falls silent ends the run once its time, extended by the wall clock,
is ``fallback.stale_after_s`` past the end. A paced source-clock source (the simulator in real
time, a paced replay) that falls more than :data:`BEHIND_WARN_S` behind the wall clock is
logged once (``behind_real_time``: how far, at which link time); the worst lag is
:attr:`Service.behind_max_s`.

Logging
-------
Every map, fallback, return from the fallback and held-back map is logged with its link time in
the words of the line and, for a structured formatter, as fields in the record's ``fields``
dict (``event``, ``link_time_s``, ``seq``, ``kind``, ``cause``, ``reason``, ``bits_before``,
``bits_after``, ``margin_achieved_db``, ``margin_target_db``, ``effective_frame``); the wall
time is the record's own. Every published change is also kept in :attr:`Service.timeline`
(the last :data:`TIMELINE_KEEP`) for the run summary.

Recording
---------
Estimates, maps (the bytes sent), decisions (a dict per published map: ``kind``, ``reason``,
``time_s``, ``seq``, ``cause``, ``bits_before``, ``bits_after``) and status messages are
recorded when ``record.topics`` selects them; a recording that fails stops alone (see
:mod:`brimline.daemon.runtime.outlets`).

Shutdown order
--------------
``close()``: stop the driver (``driver.close()``, the driver thread leaves at its next frame),
join the driver thread with a timeout, close the IQ capture (``record.iq``: checksum and metadata
written then), publish a final status, join the state writer thread and save the last map, close
the recording (flushed), close the main thread's sockets (explicit
LINGER), terminate the context if the service created it. Idempotent.
"""

from __future__ import annotations

import collections
import itertools
import logging
import math
import threading
import time
from typing import Callable

import zmq

from brimline.daemon.core.controller import Change, LinkController, Step
from brimline.daemon.errors import BrimlineError, ProtocolError
from brimline.daemon.records import Estimate, LoadMap
from brimline.daemon.runtime.assemble import (
    FollowerMapProvider,
    build_controller,
    build_core,
    follower_factory,
    make_driver,
    open_iq_capture,
)
from brimline.daemon.runtime.config import Config
from brimline.daemon.runtime.handoff import DriverThread, LockstepFeed, control_message
from brimline.daemon.runtime.loopback import LoopbackTransmitter
from brimline.daemon.runtime.outlets import Outlets
from brimline.daemon.runtime.status import (
    build_status,
    controller_fields,
    driver_fields,
    frame_fields,
    summary_line,
)
from brimline.daemon.runtime.timebase import Timebase
from brimline.daemon.wire import codec
from brimline.drivers.link.schedule import MapSchedule

__all__ = ["Service", "BEHIND_WARN_S", "TIMELINE_KEEP"]

log = logging.getLogger("brimline.service")

#: A paced source this far behind the wall clock (s of link time) is logged, once per run.
BEHIND_WARN_S = 0.5
#: Changes kept in :attr:`Service.timeline` (the run summary's timeline of maps).
TIMELINE_KEEP = 1000

_CLOCK_EVERY = 4  # estimates handled between two reads of the clock in one step


class Service:
    """The daemon: one driver thread feeding the link controller and its sockets.

    Parameters
    ----------
    config : Config
        Validated configuration.
    context : zmq.Context, optional
        Context for every socket; by default the service creates (and terminates) its own.
    clock : callable
        Monotonic clock in seconds (injected by tests).
    driver : Driver, optional
        Source of estimates to use instead of the one ``config.driver`` names (tests, tools).
    follow : bool
        For the simulator: close the loop (default True): in real time its transmitter follows
        the published maps through a :class:`Follower`; in fast mode it runs in lockstep with
        the controller's maps (see the module notes). False: it sends its default map.

    Attributes
    ----------
    controller : LinkController or None
        The decision path (made by :meth:`start`, with the epoch and map of the state file).

    Notes
    -----
    Use as a context manager: ``with Service(cfg) as svc: svc.run(duration_s=10)``.
    """

    def __init__(self, config: Config, *, context: zmq.Context | None = None,
                 clock: Callable[[], float] = time.monotonic, driver=None,
                 follow: bool = True) -> None:
        self.config = config
        self._clock = clock
        self._own_context = context is None
        self._context = context
        self._given_driver = driver
        self._follow = follow
        self.plan, self.loader, self._estimator, self._change = build_core(config)
        mode = config.service.clock
        self.timebase = Timebase(("monotonic" if config.driver.live else "source")
                                 if mode == "auto" else mode, clock)
        self.controller: LinkController | None = None
        self.driver = None
        self._capture = None  # the IQ capture (record.iq), closed after the driver thread
        self.epoch = ""
        self.driver_state = "starting"
        self.driver_error: str | None = None
        self.last_status: dict | None = None
        self._holding = False  # maps are being held back (logged once per episode)
        self._in_fallback = False  # the last map sent was the fallback map (for the log)
        self._handoff: DriverThread | None = None
        self._poller = None
        self._io: Outlets | None = None  # sockets, state file, recorder
        self._provider: FollowerMapProvider | None = None
        #: The single-radio loopback transmitter (``driver.radio.transmit``), else None.
        self.loopback: LoopbackTransmitter | None = None
        #: Lockstep mode (fast simulation): the maps in force by frame, fed straight from the
        #: controller (None otherwise).
        self.schedule: MapSchedule | None = None
        self._feed: LockstepFeed | None = None
        self._started = False
        self._closed = False
        #: Every published change of this run, oldest first (the last TIMELINE_KEEP).
        self.timeline: collections.deque[Change] = collections.deque(maxlen=TIMELINE_KEEP)
        #: Most a paced source-clock source fell behind the wall clock, s of link time.
        self.behind_max_s = 0.0
        self._pace_origin: tuple[float, float] | None = None  # (link time, wall) of the first
        self._run_for_s: float | None = None  # run()'s duration in link time
        self._origin_s: float | None = None   # the link time it counts from
        self._run_over = False                # an estimate at or past the end arrived

    @property
    def current_map(self) -> LoadMap | None:
        """The map in force (the last one published, or the restored one)."""
        return None if self.controller is None else self.controller.current_map

    # ------------------------------------------------------------------ life cycle

    def __enter__(self) -> "Service":
        self.start()
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def start(self) -> None:
        """Load state (saving the first seq lease), bind the sockets, open the recording and
        start the driver thread.

        Raises
        ------
        SourceError
            When the estimate source cannot be opened.
        BrimlineError
            Socket, state or recording problems (already one line each).
        """
        if self._closed:
            raise RuntimeError("service is closed")
        if self._started:
            return
        self._started = True
        if self._context is None:
            self._context = zmq.Context()
        try:
            self._io = Outlets(self.config, self._context, self.plan)
            self.epoch = self._io.epoch
            self.timebase.start()
            self.controller = build_controller(
                self.config, self.plan, self.loader, self._estimator, self._change,
                epoch=self.epoch, next_seq=self._io.next_seq, restored=self._io.restored,
                reserve=self._io.reserve, start_s=self.core_now())
            if self._io.restored is not None:
                self._io.maps.prime(self._io.restored)
                log.info("restored map seq %d (epoch %s) from %s", self._io.restored.seq,
                         self.epoch, self.config.service.state_path)
            d = self.config.driver
            if self._given_driver is not None:
                self.driver = self._given_driver
            elif (d.kind == "sim" and self._follow and not d.sim.realtime
                  and self.timebase.mode == "source"):
                self.schedule = MapSchedule()
                if self._io.restored is not None:  # its frame numbers are another run's
                    self.schedule.schedule(self._io.restored, from_frame=0)
                self.driver = make_driver(self.config, self.plan, self.schedule)
                self._feed = LockstepFeed(self.driver, clock_every=_CLOCK_EVERY)
            else:
                if d.kind == "sim" and self._follow:
                    self._provider = FollowerMapProvider(follower_factory(
                        self.config, self.plan, self.endpoints, self._context))
                self._capture = open_iq_capture(self.config, self.plan)
                try:
                    self.driver = make_driver(self.config, self.plan, self._provider,
                                              capture=self._capture)
                except BaseException:
                    if self._capture is not None:  # nothing captured: leave no files behind
                        self._capture.abandon()
                        self._capture = None
                    raise
            self._poller = zmq.Poller()
            if self.schedule is None:
                self._handoff = DriverThread(self._context, self.driver, on_exit=None if
                                             self._provider is None else self._provider.close)
                self._poller.register(self._handoff.rx, zmq.POLLIN)
            for sock in self._io.poll_sockets():
                self._poller.register(sock, zmq.POLLIN)
        except BaseException:
            self.close()
            raise
        if self._handoff is not None:
            self._handoff.start()
        d = self.config.driver
        if d.kind == "radio" and d.radio.transmit:
            # The single-radio loopback: brimline tx's loop on this radio, following these maps.
            self.loopback = LoopbackTransmitter(self.config, self.plan, self.endpoints,
                                                context=self._context, clock=self._clock)
            self.loopback.start()
        self.driver_state = "running"
        log.info("started: source %s, clock %s, epoch %s, maps on %s, status on %s",
                 getattr(self.driver, "name", "driver"), self.timebase.mode, self.epoch,
                 self.endpoints.get("maps"), self.endpoints.get("status"))

    @property
    def acks(self) -> dict[str, dict]:
        """Acknowledgements received, summed by follower stream (see the outlets)."""
        return {} if self._io is None else self._io.acks

    @property
    def endpoints(self) -> dict[str, str]:
        """Actual bound endpoints (ports resolved when the config asked for port 0)."""
        return {} if self._io is None else self._io.endpoints()

    def close(self) -> None:
        """Ordered shutdown (see the module docstring). Idempotent."""
        if self._closed:
            return
        self._closed = True
        if self.loopback is not None:
            self.loopback.close()  # silences the radio first
        if self.driver is not None:
            try:
                self.driver.close()
            except Exception:  # noqa: BLE001 - a driver's close must not stop the shutdown
                log.exception("driver close failed")
        if self._handoff is not None:
            self._handoff.join(self.config.service.driver_join_s)
            if self._handoff.alive:
                log.warning("driver thread did not stop within %.1f s",
                            self.config.service.driver_join_s)
        if self._capture is not None:
            try:  # after the driver thread: the checksum covers every sample written
                self._capture.close()
            except BrimlineError as exc:
                log.error("IQ capture not closed cleanly: %s", exc)
        if self._io is not None:
            if self.controller is not None:
                if self._started and self.driver_state not in ("failed", "ended"):
                    self.driver_state = "stopped"
                try:
                    self.publish_status()
                except BrimlineError as exc:
                    log.warning("final status not sent: %s", exc)
            self._io.close(self.current_map)
        if self._handoff is not None:
            self._handoff.close()
        if self._own_context and self._context is not None:
            self._context.term()

    # ------------------------------------------------------------------ main thread

    @property
    def clock_mode(self) -> str:
        """``"source"`` or ``"monotonic"`` (see :mod:`brimline.daemon.runtime.timebase`)."""
        return self.timebase.mode

    def core_now(self) -> float:
        """Time fed to the controller now, s."""
        return self.timebase.now()

    def run(self, duration_s: float | None = None, *, stop: threading.Event | None = None,
            on_status: Callable[[dict], None] | None = None) -> None:
        """Run the loop until ``duration_s`` of link time passes, ``stop`` is set or the source
        ends.

        Parameters
        ----------
        duration_s : float, optional
            Bound on the run in seconds of link time (see the module notes): with the source
            clock, estimates whose time is ``duration_s`` or more after the first one's are not
            used, and the run ends there.
        stop : threading.Event, optional
            Set (e.g. by a signal handler) to finish the current step and return.
        on_status : callable, optional
            Called with every status message published (the CLI's live line).
        """
        self.start()
        self._run_for_s = duration_s
        self._run_over = False
        self._origin_s = self.core_now() if self.timebase.mode == "monotonic" else None
        start_wall = self._clock()
        while not (stop is not None and stop.is_set()):
            if self._run_over or self._silent_past_end(start_wall):
                break
            timeout = self.config.service.poll_s
            if duration_s is not None and self.timebase.mode == "monotonic":
                timeout = min(timeout, max(0.0, self._origin_s + duration_s - self.core_now()))
            status = self.step(timeout)
            if status is not None and on_status is not None:
                on_status(status)
            if self.driver_state in ("ended", "failed") and not self._pending():
                if self.driver_state == "ended":
                    break
                # A failed source: keep serving the last map, status and fallback until told
                # to stop (the operator sees driver_failed in the status).

    def _past_end(self, link_s: float) -> bool:
        """Whether link time ``link_s`` is at or past the end of :meth:`run`'s duration (the
        first time seen opens the count with the source clock)."""
        if self._run_for_s is None:
            return False
        if self._origin_s is None:
            self._origin_s = link_s
        if link_s - self._origin_s >= self._run_for_s - 1e-9:
            self._run_over = True
        return self._run_over

    def _silent_past_end(self, start_wall: float) -> bool:
        """The end of the duration for a source that sends nothing (see the module notes)."""
        if self._run_for_s is None:
            return False
        if self.timebase.mode == "monotonic":
            return self._past_end(self.core_now())
        grace = self._run_for_s + self.config.fallback.stale_after_s
        if self._origin_s is None:
            return self._clock() - start_wall >= grace
        return self.core_now() - self._origin_s >= grace

    def _check_pace(self, link_s: float) -> None:
        """Note how far a paced source-clock source is behind the wall clock; log it once."""
        if self.timebase.mode != "source" or getattr(self.driver, "realtime", False) is not True:
            return
        wall = self._clock()
        if self._pace_origin is None:
            self._pace_origin = (link_s, wall)
            return
        behind = (wall - self._pace_origin[1]) - (link_s - self._pace_origin[0])
        if behind > self.behind_max_s:
            first = self.behind_max_s <= BEHIND_WARN_S < behind
            self.behind_max_s = behind
            if first:
                name = getattr(self.driver, "name", "driver")
                log.warning("source %s is %.2f s behind real time at link time %.2f s (this "
                            "machine does not keep its pace; link time, --duration included, "
                            "runs on)", name, behind, link_s,
                            extra={"fields": {"event": "behind_real_time", "link_time_s": link_s,
                                              "behind_s": round(behind, 3), "source": name}})

    @property
    def lockstep(self) -> bool:
        """Whether the simulator runs in lockstep on the main thread (see the module notes)."""
        return self.schedule is not None

    def _pending(self) -> bool:
        return self._handoff is not None and self._handoff.pending()

    def step(self, timeout_s: float = 0.05) -> dict | None:
        """Wait up to ``timeout_s`` for input, handle it, and run what is due.

        Estimates are handled until the next heartbeat or status period is due (the clock is
        read every few estimates), so the timers keep their schedule under any flood.

        Returns
        -------
        dict or None
            The status message when one was published in this step.
        """
        # Heartbeats first: the call sends one if due and says when the next is due, which
        # bounds the poll so heartbeats stay on time however quiet the sockets are.
        wall = self._clock()
        until_beat = self._io.heartbeat_due(wall)
        if self.lockstep and self.driver_state == "running":
            timeout_s = 0.0  # frames are waiting to be simulated: poll the sockets only
        events = dict(self._poller.poll(int(math.ceil(max(0.0, min(timeout_s, until_beat))
                                                      * 1000))))
        if self.lockstep and self.driver_state == "running":
            self._lockstep_frames(min(wall + until_beat,
                                      self._clock() + 1.0 / self.config.status.rate_hz))
        if self._handoff is not None and self._handoff.rx in events:
            deadline = min(wall + until_beat, self._clock() + 1.0 / self.config.status.rate_hz)
            for handled in itertools.count():
                if handled and handled % _CLOCK_EVERY == 0 and self._clock() >= deadline:
                    break  # the rest waits for the next step, after the heartbeat
                if self._run_over:
                    break  # the duration is over: the rest is not used
                frames = self._handoff.receive()
                if frames is None:
                    break
                self._handle_inproc(frames)
        for sock in self._io.poll_sockets():
            if sock in events:
                self._io.handle(sock, self.controller, self.core_now(), self._clock())
        # Staleness while the source is silent: not for a source that runs on its own time
        # as fast as it is read (its gaps show in its estimates' times), unless it failed.
        # (In lockstep the source is never silent: a frame without estimate is a tick.)
        if not self.lockstep and (self.driver_state == "failed" or (
                self.driver_state == "running" and self.timebase.watches_silence(self.driver))):
            self._carry_out(self.controller.on_tick(self.core_now()))
        if self._io.status.due(self._clock()):
            return self.publish_status()
        return None

    def _lockstep_frames(self, deadline: float) -> None:
        ended = self._feed.run(deadline, self._clock, process=self.process,
                               tick=lambda t: self._carry_out(self.controller.on_tick(t)),
                               keep_going=lambda t: not self._past_end(t))
        if ended is not None:
            self.driver_state, self.driver_error = ended

    def _handle_inproc(self, frames) -> None:
        msg = control_message(frames)
        if msg is not None:
            self.driver_state = msg["state"]
            self.driver_error = msg.get("error")
            if self.driver_state == "failed":
                log.error("source %s stopped: %s", getattr(self.driver, "name", "driver"),
                          self.driver_error)
            else:
                log.info("source %s ended", getattr(self.driver, "name", "driver"))
            return
        try:
            _topic, estimate = codec.decode(frames)
            if not isinstance(estimate, Estimate):
                raise ProtocolError(f"expected an estimate, got {type(estimate).__name__}")
        except ProtocolError as exc:
            self.controller.count_undecodable()
            log.warning("dropped an undecodable estimate: %s", exc)
            return
        self.process(estimate, frames=frames)

    def process(self, estimate: Estimate, *, frames=None) -> LoadMap | None:
        """Give one estimate to the controller and carry out its step.

        Parameters
        ----------
        estimate : Estimate
            The estimate.
        frames : list, optional
            The estimate as the codec encoded it (the driver thread's hand-off), recorded as
            is instead of being encoded again.

        Returns
        -------
        LoadMap or None
            The newest map published for this estimate (the fallback map when the estimate
            revealed a stale gap and nothing newer replaced it), or None.

        Notes
        -----
        The recording is written after the maps are sent (estimate first, then the decisions
        and maps it caused), so disk writes are not on the path to the transmitter.
        """
        link_s = self.timebase.of(estimate)
        if self._past_end(link_s):
            return None  # at or past the end of run()'s duration: not used
        self._check_pace(link_s)
        step = self.controller.on_estimate(estimate, link_s)
        self.timebase.arrived(step.now_s)
        return self._carry_out(step, estimate, frames)

    def _carry_out(self, step: Step, estimate: Estimate | None = None,
                   estimate_frames=None) -> LoadMap | None:
        """Send the step's maps, hand them to the state writer, then record and log."""
        if step.held_back is not None and not self._holding:
            log.error("new maps held back at link time %.2f s: %s", step.now_s, step.held_back,
                      extra={"fields": {"event": "held_back", "link_time_s": step.now_s,
                                        "reason": step.held_back}})
        self._holding = self.controller.state_unsaved
        sent = []
        for m in step.maps:
            if self.schedule is not None:
                self.schedule.schedule(m)
            frames = self._io.maps.publish(m)
            self._io.save_state(m, frames)
            sent.append(frames)
        # Everything below is bookkeeping after the maps are on their way.
        if estimate is not None:
            self._io.record(codec.TOPIC_ESTIMATE, estimate, estimate_frames)
        for change, frames in zip(step.changes, sent):
            self._io.record(codec.TOPIC_DECISION, {
                "kind": change.kind, "reason": change.reason, "time_s": change.time_s,
                "seq": change.seq, "cause": change.cause, "bits_before": change.bits_before,
                "bits_after": change.bits_after})
            self._io.record(codec.TOPIC_MAP, None, frames)
        for change, m in zip(step.changes, step.maps):
            self.timeline.append(change)
            t = change.time_s
            if m.fallback:
                log.warning("fallback at link time %.2f s: %s", t, change.reason,
                            extra={"fields": {"event": "fallback", "link_time_s": t,
                                              "seq": m.seq, "reason": change.reason}})
            elif self._in_fallback:
                log.info("estimates resumed at link time %.2f s: leaving the fallback map", t,
                         extra={"fields": {"event": "resumed", "link_time_s": t}})
            self._in_fallback = m.fallback
            if log.isEnabledFor(logging.INFO):
                fields = self.map_fields(change, m)
                achieved, target = fields["margin_achieved_db"], fields["margin_target_db"]
                before = "-" if change.bits_before is None else str(change.bits_before)
                margin = ("margin unknown" if achieved is None else
                          f"margin {achieved:.1f} dB (target {target:g} dB)")
                log.info("map %d at link time %.2f s: %s, %s -> %d bits/symbol, %s: %s",
                         m.seq, t, change.kind, before, m.total_bits, margin, change.reason,
                         extra={"fields": fields})
        return step.last_map

    def map_fields(self, change: Change, m: LoadMap) -> dict:
        """The structured fields of the log line of one published map.

        Parameters
        ----------
        change : Change
            The controller's record of the change.
        m : LoadMap
            The map it published.

        Returns
        -------
        dict
            ``event`` (``"map"``), ``link_time_s``, ``seq``, ``kind``, ``cause``, ``reason``,
            ``bits_before`` (None for the first map), ``bits_after``, ``effective_frame``,
            ``margin_target_db`` (``loading.margin_db``) and ``margin_achieved_db``: the margin
            every loaded tone had, on the SNR the map was made for, when it was made (the
            target plus the map's uniform margin above it, the outer loop's offset and, for an
            emergency map, ``change.emergency_margin_db``; None for the fallback map).
        """
        target = float(self.config.loading.margin_db)
        achieved = None
        if not m.fallback and math.isfinite(m.margin_db):
            extra = m.gap_db - self.loader.gap_db
            if change.kind == "emergency":
                extra += float(self.config.change.emergency_margin_db)
            achieved = round(target + extra + m.margin_db, 3)
        return {"event": "map", "link_time_s": change.time_s, "seq": m.seq,
                "kind": change.kind, "cause": change.cause, "reason": change.reason,
                "bits_before": change.bits_before, "bits_after": m.total_bits,
                "effective_frame": m.effective_frame, "margin_achieved_db": achieved,
                "margin_target_db": target}

    def status(self) -> dict:
        """The status message for the current state (see :mod:`brimline.daemon.runtime.status`)."""
        wall, now = self._clock(), self.core_now()
        return build_status(
            time_s=now, epoch=self.epoch, acks=self._io.ack_status(wall),
            target_margin_db=self.config.loading.margin_db, **frame_fields(self.plan),
            recording=self._io.recording_status(), protocol_errors=self._io.protocol_errors(),
            **driver_fields(self.driver, self.driver_state, self.driver_error),
            **controller_fields(self.controller, now),
            transmitter=None if self.loopback is None else self.loopback.status())

    def publish_status(self) -> dict:
        """Build, publish and record one status message now; returns it."""
        st = self.status()
        self._io.publish_status(st)
        self._io.record(codec.TOPIC_STATUS, st)
        self.last_status = st
        log.debug("status %s", summary_line(st))
        return st

