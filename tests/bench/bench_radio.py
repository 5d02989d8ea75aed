"""Radio driver recovery: ``reconnect_s``, from a device fault to the next valid estimate.

A stand-in device (``tests/radio_fakes.py``) serves a stream of default-map frames (an invented
AWGN test signal at 30 dB) and fails one receive with a device error; the driver tears the device
down, waits its backoff, reopens and configures it, refills a buffer and runs the receiver until
a valid estimate comes out. Measured with the driver's default backoff (``driver.radio.backoff_s``,
the backoff in force on the first retry) and a device that answers the first reopening.

* ``reconnect_s``: median over repeats of the time from the fault to the first valid estimate
  after it, s. Goal: <= 1 s plus the backoff in force.
* ``reconnect_extra_ms``: the same less the backoff: teardown, reopening, the first buffer and
  the DSP, ms (what the code adds to the wait it chose).
* ``reconnect_extra_vs_ref``: ``reconnect_extra_ms`` over the reference workload's time
  (``reference.py``), comparable between machines.
"""

from __future__ import annotations

import logging
import statistics
import sys
import time
from pathlib import Path

import numpy as np
from reference import Reference

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))  # tests/: the stand-in device
from radio_fakes import FakeAir  # noqa: E402

from brimline.drivers.link.frame import Transmitter, make_plan, map_arrays  # noqa: E402
from brimline.drivers.sources.radio import RadioDriver  # noqa: E402

BACKOFF_S = RadioDriver.__init__.__kwdefaults__["backoff_s"]

GOALS = {
    "reconnect_s": f"<= 1 s + backoff in force ({BACKOFF_S:g} s): <= {1 + BACKOFF_S:g} s",
    "reconnect_extra_ms": "informational: recovery time beyond the backoff",
    "reconnect_extra_vs_ref": "recovery beyond the backoff / reference time (lower is better)",
}


def _stream(plan, n_frames: int, gap: int, seed: int = 3) -> np.ndarray:
    rng = np.random.default_rng(seed)
    seq, bits, power = map_arrays(plan, None, 2)
    tx = Transmitter(plan)
    pieces = [np.concatenate([tx.frame(bits=bits, power_lin=power, map_seq=seq, counter=i,
                                       rng=rng).samples, np.zeros(gap, np.complex64)])
              for i in range(n_frames)]
    x = 0.1 * np.concatenate(pieces)
    sigma = 0.1 * 10 ** (-30 / 20) / np.sqrt(2)
    return (x + sigma * (rng.standard_normal(x.size) + 1j * rng.standard_normal(x.size))
            ).astype(np.complex64)


def _one(plan, stream) -> float:
    air = FakeAir(stream, errors={3})
    with RadioDriver(plan=plan, open_device=air) as drv:
        for est in drv.frames():
            if air.fault_times and est.valid and drv.counters["reconnects"] == 1:
                return time.perf_counter() - air.fault_times[0]
    raise RuntimeError("no estimate after the fault")


def run(quick: bool = False) -> dict[str, float]:
    logging.getLogger("brimline.sources.radio").setLevel(logging.ERROR)  # the injected faults
    plan = make_plan(center_hz=915e6)
    stream = _stream(plan, 40, gap=500)
    ref = Reference()
    times = []
    for _ in range(3 if quick else 9):
        ref.sample(3)
        times.append(_one(plan, stream))
    reconnect = statistics.median(times)
    extra = reconnect - BACKOFF_S
    return {
        "reconnect_s": reconnect,
        "reconnect_extra_ms": extra * 1e3,
        "reconnect_extra_vs_ref": extra / ref.seconds(),
    }


if __name__ == "__main__":
    for key, value in run(quick=True).items():
        print(f"{key:24s} {value:10.4g}   {GOALS[key]}")
