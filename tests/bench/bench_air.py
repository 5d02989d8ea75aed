"""The loop over the emulated air: estimate received by the daemon to map in force at the
transmitter.

One process holds both ends of the rehearsal (``config/rehearsal-rx.yaml`` and
``config/rehearsal-tx.yaml``, every endpoint moved to a free loopback port): the daemon
(:class:`~brimline.daemon.runtime.service.Service`) with an emulated receiver, and the
transmitter loop of ``brimline tx`` (:class:`~brimline.daemon.runtime.transmitter.TxLoop`) with
an emulated transmitter, meeting on the loopback ZeroMQ air at real-time pace. The channel
fades (EPA profile, 2 Hz Doppler, seeded) and change control is made quick to move, so maps
keep coming.

* ``air_apply_ms_p99``: for every map made from an estimate, the time from the daemon taking
  that estimate (the start of ``Service.process``) to the transmitter loop building the first
  frame under the map (its acknowledgement), ms; the 99th percentile over the run. Goal: below
  the configured lead time (``service.lead_frames`` at ``tx.frame_rate_hz``, printed in the
  goal). A map that reaches the transmitter in time is in force at the frame it names, so
  the figure is the lead less the way the estimate came (transmit queue, air, receive buffer);
  a late map is in force at the next frame built after it arrives.
* ``air_apply_ms_p99_vs_lead``: the same over the lead time (below 1 meets the goal). The
  figure is mostly real-time waiting, not computing, so its companion is the lead, not the
  reference workload.
* ``air_apply_ms_median``: informational.
* ``air_maps``: maps measured (informational; enough for a p99 when over 100).
* ``air_late_maps``: maps in force later than the frame they named. Goal: 0.
"""

from __future__ import annotations

import logging
import threading
import time
from pathlib import Path

import numpy as np

from brimline.daemon.runtime.assemble import build_core, build_tx, open_sink
from brimline.daemon.runtime.config import load_config
from brimline.daemon.runtime.service import Service

ROOT = Path(__file__).resolve().parents[2]
RX = ROOT / "config" / "rehearsal-rx.yaml"
TX = ROOT / "config" / "rehearsal-tx.yaml"
ANY = "tcp://127.0.0.1:0"

_LEAD = load_config(RX).service.lead_frames
_RATE = load_config(TX).tx.frame_rate_hz
LEAD_MS = 1e3 * _LEAD / _RATE

GOALS = {
    "air_apply_ms_p99": f"< lead time ({_LEAD} frames at {_RATE:g} frames/s = {LEAD_MS:g} ms)",
    "air_apply_ms_p99_vs_lead": "< 1 (p99 over the lead time)",
    "air_apply_ms_median": "informational",
    "air_maps": "informational: maps measured",
    "air_late_maps": "0 (maps in force after the frame they named)",
}

# Quick to move, so that a short run makes many maps (the rehearsal's own values are calmer).
_CHANGE = {"change.up_dwell_s": 0.2, "change.max_maps_per_s": 8.0,
           "change.downshift_margin_db": 0.0}
_CHANNEL = {"emulated.profile": "epa", "emulated.doppler_hz": 2.0, "emulated.seed": 11,
            "emulated.snr_db": 30.0}


def measure(duration_s: float) -> dict[str, float]:
    """Run both ends for ``duration_s`` and return the figures."""
    tx_cfg = load_config(TX, overrides={"emulated.air_endpoint": ANY, "tx.seed": 5,
                                        "tx.status_endpoint": ANY})
    plan = build_core(tx_cfg)[0]
    sink = open_sink(tx_cfg, plan)
    with sink:
        sink.send(np.zeros(round(plan.sample_rate_hz / tx_cfg.tx.frame_rate_hz),
                           np.complex64))  # binds the air: its port is known from here on
        air = sink.device.air_tx_endpoint
        rx_cfg = load_config(RX, overrides={
            "emulated.air_endpoint": air, "publish.map_endpoint": ANY,
            "publish.snapshot_endpoint": ANY, "publish.ack_endpoint": ANY,
            "status.endpoint": ANY, **_CHANNEL, **_CHANGE})
        taken: dict[int, float] = {}  # map seq -> when the daemon took its estimate
        applied: dict[int, float] = {}  # map seq -> when the transmitter put it in force
        late = [0]
        svc = Service(rx_cfg)
        process = svc.process

        def timed_process(estimate, **kw):
            t0 = time.monotonic()
            before = svc.current_map
            out = process(estimate, **kw)
            now = svc.current_map
            if now is not None and now is not before and not now.fallback:
                taken.setdefault(now.seq, t0)
            return out
        svc.process = timed_process
        with svc:
            svc.start()
            ep = svc.endpoints
            loop = build_tx(tx_cfg, plan, sink, status=False, map_endpoint=ep["maps"],
                            snapshot_endpoint=ep["snapshots"], ack_endpoint=ep["acks"])
            ack = loop.follower.ack

            def timed_ack(frame, now_s, seq):
                applied.setdefault(seq, time.monotonic())
                if loop.in_force is not None and frame > loop.in_force.effective_frame:
                    late[0] += 1
                return ack(frame, now_s, seq)
            loop.follower.ack = timed_ack
            stop = threading.Event()
            runner = threading.Thread(target=loop.run, args=(stop,), daemon=True)
            runner.start()
            try:
                svc.run(duration_s)
            finally:
                stop.set()
                runner.join(30)
                loop.close()
    delays = [applied[s] - taken[s] for s in taken if s in applied]
    if not delays:
        raise RuntimeError("no map made from an estimate reached the transmitter")
    ms = np.array(delays) * 1e3
    p99 = float(np.percentile(ms, 99))
    return {
        "air_apply_ms_p99": p99,
        "air_apply_ms_p99_vs_lead": p99 / LEAD_MS,
        "air_apply_ms_median": float(np.median(ms)),
        "air_maps": float(ms.size),
        "air_late_maps": float(late[0]),
    }


def run(quick: bool = False) -> dict[str, float]:
    logging.getLogger("brimline").setLevel(logging.ERROR)
    return measure(20.0 if quick else 60.0)


if __name__ == "__main__":
    for key, value in run(quick=True).items():
        print(f"{key:28s} {value:10.4g}   {GOALS[key]}")
