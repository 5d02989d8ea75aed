"""Transmitter side (``brimline tx``): frame building cost and real-time headroom.

* ``tx_frame_us_1024``: one frame built for a 1024-point FFT link (800 used tones, 28 data
  symbols, the plan of ``bench_rx.py``) with a loaded map (4 to 8 bits per tone, uneven power),
  power bound and digital backoff included: what the transmitter loop does per frame.
* ``tx_frame_us_1024_vs_ref``: the same time over the reference workload's (``reference.py``),
  timed interleaved with it (lower is better).
* ``tx_realtime_factor``: frame slots the loop builds per second (one ``TxLoop.step`` to a sink
  that drops the samples, follower poll and status included) over the frames needed per second
  at the demo numerology (``config/demo.yaml``: 256-point FFT at 3.84 MS/s, 50 frames per
  second).
* ``tx_back_to_back_factor``: the same rate over frames sent back to back at the demo
  numerology (one frame every ``frame_len / sample_rate_hz``, 833 per second); informational.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from reference import Reference, interleaved

from brimline.daemon.net.follower import Follower
from brimline.daemon.runtime.config import load_config
from brimline.daemon.runtime.transmitter import TxLoop
from brimline.drivers.link.frame import Transmitter, make_plan
from brimline.drivers.link.schedule import PowerBound
from brimline.drivers.sinks.base import Sink

GOALS = {
    "tx_frame_us_1024": "build one 1024-point frame (informational; see _vs_ref)",
    "tx_frame_us_1024_vs_ref": "frame time / reference time (lower is better)",
    "tx_realtime_factor": ">= 20 x the demo's frame rate",
    "tx_back_to_back_factor": "informational: over frames sent back to back",
}

PLAN_1024 = dict(fft_size=1024, cp_len=72, sample_rate_hz=15.36e6, used_tones_half=400,
                 pilot_spacing=8, train_symbols=2, data_symbols=28)
DEMO = Path(__file__).resolve().parents[2] / "config" / "demo.yaml"


class _NullSink(Sink):
    name = "null"

    def _send(self, samples):
        pass


def _frame_builder(plan, rng):
    tx = Transmitter(plan)
    bound = PowerBound(plan.data_tones.size)
    n = plan.data_tones.size
    bits = rng.integers(4, 9, n)
    power = rng.uniform(0.5, 1.5, n)
    scale = np.float32(0.25)

    def build():
        p = bound(power).power_lin
        frame = tx.frame(bits=bits, power_lin=p, map_seq=1, counter=0, rng=rng)
        x = frame.samples * scale
        mag = np.abs(x)
        over = mag > 1.0
        x[over] /= mag[over]
        return x
    return build


def run(quick: bool = False) -> dict[str, float]:
    rng = np.random.default_rng(20261203)
    build = _frame_builder(make_plan(**PLAN_1024), rng)

    config = load_config(DEMO)
    demo = config.link.model_dump()
    plan = make_plan(**demo)
    rate_hz = config.driver.sim.frame_rate_hz
    # A follower of a daemon that is not there: poll() costs what it costs when idle.
    follower = Follower(plan=plan, map_endpoint="tcp://127.0.0.1:1",
                        snapshot_endpoint="tcp://127.0.0.1:2", heartbeat_timeout_s=1e9)
    loop = TxLoop(plan=plan, follower=follower, sink=_NullSink(), frame_rate_hz=rate_hz)
    clock = [0.0]

    def step():
        clock[0] += 1.0 / rate_hz
        loop.step(clock[0])

    repeats = 60 if quick else 200
    ref = Reference()
    try:
        t_frame, t_step, t_ref = interleaved([build, step, ref.work], repeats)
    finally:
        loop.close()
    per_s = 1.0 / t_step
    return {
        "tx_frame_us_1024": t_frame * 1e6,
        "tx_frame_us_1024_vs_ref": t_frame / t_ref,
        "tx_realtime_factor": per_s / rate_hz,
        "tx_back_to_back_factor": per_s * plan.frame_duration_s,
    }


if __name__ == "__main__":
    for key, value in run(quick=True).items():
        print(f"{key:28s} {value:10.4g}   {GOALS[key]}")
