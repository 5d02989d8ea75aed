"""Benchmark of offline replay (part "offline"): ``brimline replay`` as fast as it goes.

``replay_fps`` replays an estimate recording through
:func:`brimline.daemon.runtime.offline.replay_offline` (read and decode, the link controller,
the per-frame timeline) with no sockets and no pacing. The recording is made here, in a
temporary folder: 200 data tones (``link.used_tones_half: 115`` with the default pilot
spacing), 50 frames per second, a static frequency response drawn once from the 3GPP EVA
tapped delay line (TS 36.101 Annex B.2, Table B.2.1-3; Rayleigh taps, seeded) at 25 dB with
1 dB of Gaussian estimation noise per tone and frame, and a 10 dB fade of a quarter of the
band from 4 s to 8 s so that change control has work to do. ``replay_fps_vs_ref`` is the
frames replayed in one reference time (``reference.py``), sampled around each pass.
``replay_fps_nopredict`` is the same replay with ``estimator.predict_s: 0`` (no channel
prediction), so the prediction's share of the time shows. The two parts of a replay are also
timed alone (information): reading and decoding the recording (``replay_read_fps``) and the
link controller on the decoded estimates (``replay_controller_fps``), to show where the time
goes.
"""

from __future__ import annotations

import tempfile
import time
from pathlib import Path

import numpy as np
from reference import Reference

from brimline.daemon.records import Estimate
from brimline.daemon.runtime.assemble import build_controller, build_core
from brimline.daemon.runtime.config import load_config
from brimline.daemon.runtime.offline import replay_offline
from brimline.daemon.wire import codec
from brimline.daemon.wire.recording import RecordWriter, read_recording
from brimline.drivers.link.frame import make_plan

GOALS = {
    "replay_fps": ">= 5000 frames/s (estimate recording, 200 tones, as fast as possible)",
    "replay_fps_vs_ref": "frames replayed per reference time (higher is better)",
    "replay_fps_nopredict": "info: the same replay with estimator.predict_s: 0, frames/s",
    "replay_fps_nopredict_vs_ref": "info: frames replayed without prediction per reference time",
    "replay_read_fps": "info: reading and decoding the recording alone, frames/s",
    "replay_read_fps_vs_ref": "info: frames read per reference time",
    "replay_controller_fps": "info: the link controller alone on decoded estimates, frames/s",
    "replay_controller_fps_vs_ref": "info: frames decided per reference time",
}

OVERRIDES = {"link.used_tones_half": 115}
NO_PREDICTION = {**OVERRIDES, "estimator.predict_s": 0}
FRAME_S = 0.02
# 3GPP TS 36.101 Table B.2.1-3 (EVA): delays in ns, relative powers in dB.
EVA_NS = (0, 30, 150, 310, 370, 710, 1090, 1730, 2510)
EVA_DB = (0.0, -1.5, -1.4, -3.6, -0.6, -9.1, -7.0, -12.0, -16.9)


def _write_recording(path: Path, frames: int) -> int:
    cfg = load_config(None, overrides=OVERRIDES)
    plan = make_plan(**cfg.link.model_dump())
    tones = plan.data_tones
    rng = np.random.default_rng(20261203)
    freq_hz = tones.astype(np.float64) * plan.tone_spacing_hz
    taps = (np.sqrt(10 ** (np.array(EVA_DB) / 10) / 2)
            * (rng.standard_normal(len(EVA_NS)) + 1j * rng.standard_normal(len(EVA_NS))))
    response = np.exp(-2j * np.pi * np.outer(freq_hz, np.array(EVA_NS) * 1e-9)) @ taps
    base_db = 25.0 + 10 * np.log10(np.abs(response) ** 2 / np.mean(np.abs(response) ** 2))
    faded = slice(0, tones.size // 4)
    with RecordWriter(path, topics=[codec.TOPIC_ESTIMATE]) as out:
        for i in range(frames):
            t = i * FRAME_S
            snr = base_db + rng.normal(0.0, 1.0, tones.size)
            if 4.0 <= t < 8.0:
                snr[faded] -= 10.0
            noise = np.full(tones.size, 1e-3, dtype=np.float32)
            channel = np.sqrt(noise * 10 ** (snr / 10)).astype(np.complex64)
            out.write(codec.TOPIC_ESTIMATE, Estimate(
                frame=i, time_s=t, plan_id=plan.plan_id, tone_index=tones, channel=channel,
                noise_var=noise, snr_db=snr.astype(np.float32)))
    return int(tones.size)


def _read(path: Path) -> list:
    return [r for _t, r in read_recording(path, topics=[codec.TOPIC_ESTIMATE])]


def _decide(estimates: list) -> None:
    cfg = load_config(None, overrides=OVERRIDES)
    plan, loader, estimator, change = build_core(cfg)
    controller = build_controller(cfg, plan, loader, estimator, change, epoch="bench")
    for est in estimates:
        controller.on_estimate(est, est.time_s)


def run(quick: bool = False) -> dict[str, float]:
    frames = 1000 if quick else 3000
    passes = 2 if quick else 3
    ref = Reference()
    best = {"replay": 0.0, "nopredict": 0.0, "read": 0.0, "controller": 0.0}
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "bench.brlog"
        n_tones = _write_recording(path, frames)
        assert n_tones == 200
        estimates = _read(path)
        mark = ref.mark()
        for _ in range(passes):
            # The whole replay (with and without prediction), then its two main parts alone,
            # with the reference between.
            for name, work in (("replay", lambda: replay_offline(None, path,
                                                                 overrides=OVERRIDES)),
                               ("nopredict", lambda: replay_offline(None, path,
                                                                    overrides=NO_PREDICTION)),
                               ("read", lambda: _read(path)),
                               ("controller", lambda: _decide(estimates))):
                ref.sample(3)
                t0 = time.perf_counter()
                work()
                best[name] = max(best[name], frames / (time.perf_counter() - t0))
            ref.sample(3)
    out = {}
    for name, key in (("replay", "replay_fps"), ("nopredict", "replay_fps_nopredict"),
                      ("read", "replay_read_fps"),
                      ("controller", "replay_controller_fps")):
        out[key] = best[name]
        out[f"{key}_vs_ref"] = ref.rate_ratio(best[name], mark)
    return out


if __name__ == "__main__":
    for key, value in run(quick=True).items():
        print(f"{key:28s} {value:10.4g}   {GOALS[key]}")
