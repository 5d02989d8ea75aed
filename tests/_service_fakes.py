"""Test helpers for the service tests: a scripted estimate source and config builders.

The scenario is invented for tests (no real link): a flat channel at a fixed SNR with a
scripted fade of one band and scripted silent gaps. Randomness is a seeded Generator.
"""

from __future__ import annotations

import math
from typing import Iterator, Sequence

import numpy as np

from brimline.daemon.records import Estimate
from brimline.daemon.runtime.config import Config
from brimline.drivers.sources.base import Driver


class ScriptedDriver(Driver):
    """Estimates of a flat channel with optional fades and silent gaps, as fast as consumed.

    Parameters
    ----------
    plan : TonePlan
        Tone plan of the estimates.
    frames : int
        Number of frames to yield.
    frame_s : float
        Source time between frames, s.
    snr_db : float
        SNR of every tone before fades, dB.
    fades : sequence of (start_s, first_index, last_index, depth_db)
        From ``start_s`` on, data tones ``first_index..last_index`` (positions in the plan's
        data tones, inclusive) lose ``depth_db``.
    gaps : sequence of (start_s, stop_s)
        No frames are produced with ``time_s`` in ``[start_s, stop_s)`` (frame numbers go on).
    seed : int
        Seed of the per-frame SNR jitter (0.3 dB rms).
    fail_at : int or None
        Raise ``RuntimeError`` instead of yielding this frame (a driver bug).
    bad_every : int or None
        Every ``bad_every``-th frame has NaN SNR on all tones (dropped by the estimator).
    gate : threading.Event or None
        Wait for it before the first frame (lets a test connect followers first).
    hold_at : int or None
        Before frame ``hold_at``, wait for ``release`` (a source that goes silent).
    release : threading.Event or None
        See ``hold_at``.
    """

    name = "scripted"

    def __init__(self, plan, *, frames: int = 200, frame_s: float = 0.01, snr_db: float = 25.0,
                 fades: Sequence[tuple] = (), gaps: Sequence[tuple] = (), seed: int = 7,
                 fail_at: int | None = None, bad_every: int | None = None,
                 t0_s: float = 0.0, frame0: int = 0, gate=None, hold_at: int | None = None,
                 release=None) -> None:
        super().__init__()
        self.plan = plan
        self.n_frames = frames
        self.frame_s = frame_s
        self.snr_db = snr_db
        self.fades = list(fades)
        self.gaps = list(gaps)
        self.seed = seed
        self.fail_at = fail_at
        self.bad_every = bad_every
        self.t0_s = t0_s
        self.frame0 = frame0
        self.gate = gate
        self.hold_at = hold_at
        self.release = release

    def snr_at(self, t_s: float) -> np.ndarray:
        n = self.plan.data_tones.size
        snr = np.full(n, self.snr_db)
        for start_s, first, last, depth_db in self.fades:
            if t_s >= start_s:
                snr[first:last + 1] -= depth_db
        return snr

    def _frames(self) -> Iterator[Estimate]:
        rng = np.random.default_rng(self.seed)
        tones = self.plan.data_tones
        noise_var = np.full(tones.size, 1e-2)
        if self.gate is not None:
            while not self.gate.wait(0.05):
                if self.closed:
                    return
        for k in range(self.n_frames):
            if self.closed:
                return
            if self.hold_at is not None and k == self.hold_at:
                while not self.release.wait(0.05):
                    if self.closed:
                        return
            t = self.t0_s + k * self.frame_s
            jitter = rng.normal(0.0, 0.3, tones.size)
            if any(a <= t < b for a, b in self.gaps):
                continue
            if self.fail_at is not None and k == self.fail_at:
                raise RuntimeError("scripted driver failure")
            snr = self.snr_at(t) + jitter
            if self.bad_every and k % self.bad_every == self.bad_every - 1:
                snr = np.full(tones.size, math.nan)
            channel = np.sqrt(10 ** (snr / 10) * noise_var).astype(np.complex64)
            self.counters["frames"] += 1
            yield Estimate(frame=self.frame0 + k, time_s=t, plan_id=self.plan.plan_id,
                           tone_index=tones, channel=channel, noise_var=noise_var,
                           snr_db=snr)


class ReloadEveryTime:
    """Change control that turns every tracked view into a reload (a map per estimate)."""

    def __init__(self, loader) -> None:
        self.loader = loader
        self.current = None

    def decide(self, tracked, now_s):
        from brimline.daemon.records import Decision, DecisionKind

        alloc = self.loader(10.0 ** (np.asarray(tracked.effective_snr_db) / 10.0))
        self.current = alloc
        return Decision(DecisionKind.RELOAD, "test reload", alloc, int(alloc.bits.size))

    def force(self, allocation, kind, reason, now_s):
        self.current = allocation


def loopback_config(tmp_path=None, **sections) -> Config:
    """A Config on loopback with port-0 endpoints; ``sections`` override whole sections."""
    data = {
        "publish": {"map_endpoint": "tcp://127.0.0.1:0", "snapshot_endpoint": "tcp://127.0.0.1:0",
                    "ack_endpoint": "tcp://127.0.0.1:0", "heartbeat_s": 0.1, "linger_s": 0.0},
        "status": {"endpoint": "tcp://127.0.0.1:0", "rate_hz": 20.0},
        "fallback": {"stale_after_s": 0.5, "bits": 2},
        "change": {"up_dwell_s": 0.2},
        "service": {"poll_s": 0.01, "driver_join_s": 2.0},
    }
    if tmp_path is not None:
        data["service"]["state_path"] = str(tmp_path / "state.bin")
    for name, value in sections.items():
        if isinstance(value, dict) and isinstance(data.get(name), dict):
            data[name] = {**data[name], **value}
        else:
            data[name] = value
    return Config.model_validate(data)
