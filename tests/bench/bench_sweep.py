"""IQ replay through the receiver, and sweeps on Dask: 2 worker processes against 1.

``replay_iq_msps``: a seeded simulated capture (ci16, default link plan, EPA channel at 25 dB)
read by the IQ driver (memory-mapped SigMF, checksum checked) through the receiver and the link
controller, in this process: mega-samples per second on one core (lower-quartile pass time,
interleaved with the reference workload), with ``replay_iq_msps_vs_ref``.

``sweep_speedup_2``: the same grid (4 captures x 2 settings, each task a capture through the
receiver and controller, about a second of work) on a local Dask cluster of 1 and of 2 worker
processes (one thread each), time from submission to the last result. Both clusters are up at
once and warmed up (the grid run once on each, so the workers have imported brimline); then the
grid runs on one and on the other in turn, and the speed-up is the ratio of their lower-quartile
times. It needs 2 idle cores: on a busy box it moves with the load.
"""

from __future__ import annotations

import logging
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

from reference import Reference, lower_quartile  # noqa: E402

from brimline.daemon.runtime.config import Config  # noqa: E402
from brimline.daemon.runtime.sweep import replay_summary, run_sweep  # noqa: E402
from brimline.daemon.wire.sigmf import read_sigmf, write_sigmf  # noqa: E402
from brimline.drivers.link.frame import make_plan  # noqa: E402
from brimline.drivers.sources.sim import SimDriver  # noqa: E402

GOALS = {
    "replay_iq_msps": "info: MS/s of SigMF IQ through receiver and controller, one core",
    "replay_iq_msps_vs_ref": "mega-samples per reference time (higher is better)",
    "sweep_speedup_2": ">= 1.7 (same grid: time on 1 worker process / time on 2)",
}


def _capture(folder: Path, name: str, frames: int, seed: int) -> str:
    plan = make_plan()
    sim = SimDriver(plan=plan, profile="epa", doppler_hz=5.0, snr_db=25.0, seed=seed,
                    realtime=False)
    x = sim.capture(frames, gap_samples=700) * 0.1  # headroom below ci16 full scale
    write_sigmf(folder / name, x, sample_rate_hz=plan.sample_rate_hz, datatype="ci16_le",
                plan=plan)
    return str(folder / name)


def _iq_msps(path: str, repeats: int, ref: Reference) -> float:
    n = read_sigmf(path).n_samples
    config = Config()
    times = []
    for _ in range(repeats):
        ref.sample(3)
        t0 = time.perf_counter()
        replay_summary(config, path, {})
        times.append(time.perf_counter() - t0)
    times.sort()
    return n / times[len(times) // 4] / 1e6


def _sweep_speedup(recordings: list[str], settings: list[dict], repeats: int) -> float:
    """Time on 1 worker process / time on 2, both clusters up at once and timed in turn."""
    from dask import distributed  # optional extra [sweep]

    def cluster(workers: int):
        return distributed.LocalCluster(n_workers=workers, threads_per_worker=1,
                                        processes=True, dashboard_address=None,
                                        silence_logs=logging.ERROR, host="127.0.0.1")

    def timed(client) -> float:
        t0 = time.perf_counter()
        results = run_sweep(Config(), recordings, settings, client=client)
        elapsed = time.perf_counter() - t0
        assert all(r.ok for r in results), [r.error for r in results if not r.ok]
        return elapsed

    with cluster(1) as c1, distributed.Client(c1) as one, \
            cluster(2) as c2, distributed.Client(c2) as two:
        timed(one), timed(two)  # warm-up: the workers import brimline, fill caches
        times_one, times_two = [], []
        for _ in range(repeats):  # interleaved, so load changes hit both alike
            times_one.append(timed(one))
            times_two.append(timed(two))
    return lower_quartile(times_one) / lower_quartile(times_two)


def run(quick: bool) -> dict[str, float]:
    ref = Reference()
    figures: dict[str, float] = {}
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        frames = 80 if quick else 150
        recordings = [_capture(folder, f"c{i}", frames, seed=11 + i) for i in range(4)]
        mark = ref.mark()
        msps = _iq_msps(recordings[0], 3 if quick else 8, ref)
        figures["replay_iq_msps"] = msps
        figures["replay_iq_msps_vs_ref"] = ref.rate_ratio(msps * 1e6, mark) / 1e6
        settings = [{"estimator.tau_s": 0.1}, {"estimator.tau_s": 1.0}]
        figures["sweep_speedup_2"] = _sweep_speedup(recordings, settings, 2 if quick else 4)
    return figures


if __name__ == "__main__":
    for key, value in run(quick="--quick" in sys.argv).items():
        print(f"{key:28s} {value:12.4g}   {GOALS[key]}")
