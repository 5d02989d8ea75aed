"""Byte identity of offline replay: pinned SHA-256 digests of what replays decide.

Each case replays a recording through :func:`brimline.daemon.runtime.offline.replay_offline`
and hashes everything a replay hands on: every map encoded for the wire
(:func:`brimline.daemon.wire.codec.encode`), the per-frame timeline (kinds, reasons, rates,
margins, live margins, seqs), the map events and the summary. The digests were recorded on
the code before any speed work on the per-estimate path; a change that is meant to be pure speed
must leave every one of them as it is. They were recorded on x86-64 Linux with numpy 2.x; a
platform whose ``exp`` or ``log10`` rounds differently in the last place could move them all
at once without any change of code (then re-pin there, on the unchanged code).

A change of decision logic moves a digest on purpose: then check the new behaviour in the tests
of the module that changed, run this file, and copy the digests the failure prints (all cases
are computed before any assertion, so one run shows every new value).

Recordings:

* the shipped demo recording with ``config/replay.yaml`` (the invented Kestrel Ridge ->
  Lowmarsh link; see ``replay/make_estimate_log.py``);
* a recording made here from a fixed seed (invented; every event listed in
  :func:`_write_eventful`): 200 data tones, a static channel drawn from the 3GPP EVA tapped
  delay line (TS 36.101 Annex B.2, Table B.2.1-3) with 1 dB of estimation noise, a partial-band
  fade, a slow drift of the whole band, a deep notch, impulse frames, a hole that brings the
  fallback map, unusable frames, a faster per-tone fade and a recovery. Its meta record holds
  the time it was written, so the maps are hashed with a fixed epoch.

The eventful recording is replayed under several settings so that every branch of the
estimator (plain, slope tracker, no lag-driven gain, no smoothing across tones) and of the
loader (rate, margin, water-filling) takes part.
"""

from __future__ import annotations

import dataclasses
import hashlib
import math
from pathlib import Path

import numpy as np
import pytest

from brimline.daemon.records import Estimate
from brimline.daemon.runtime.config import load_config
from brimline.daemon.runtime.offline import OfflineResult, replay_offline
from brimline.daemon.wire import codec
from brimline.daemon.wire.recording import RecordWriter
from brimline.drivers.link.frame import make_plan

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "replay" / "kestrel_lowmarsh_estimates.brlog"
DEMO_CONFIG = ROOT / "config" / "replay.yaml"

PLAN = {"link.used_tones_half": 115}   # 200 data tones with the default pilot spacing
FRAME_S = 0.02
# 3GPP TS 36.101 Table B.2.1-3 (EVA): delays in ns, relative powers in dB.
EVA_NS = (0, 30, 150, 310, 370, 710, 1090, 1730, 2510)
EVA_DB = (0.0, -1.5, -1.4, -3.6, -0.6, -9.1, -7.0, -12.0, -16.9)

#: Settings of each case (over the recording's config) and the digest recorded for it.
CASES = {
    "demo": ({}, "c9ac30b01664ecac"),
    "eventful": ({}, "02b608da89ff82cb"),
    "eventful_trend": ({"estimator.trend_tau_s": 0.5, "change.lookahead_s": 0.0},
                       "a5209ce565d9fbac"),
    "eventful_plain": ({"estimator.lag_sigmas": 0.0, "estimator.tone_window": 0},
                       "5dd7b3281048be5c"),
    "eventful_margin": ({"loading.mode": "margin", "loading.target_bits": 450},
                        "0a28c7aec12f340e"),
    "eventful_waterfill": ({"loading.mode": "waterfill", "loading.cap_db": 3.0},
                           "bfd56c108343ea84"),
}


def _write_eventful(path: Path) -> None:
    """Write the invented eventful recording (1500 frames at 50 per second, seeded)."""
    cfg = load_config(None, overrides=PLAN)
    plan = make_plan(**cfg.link.model_dump())
    tones = plan.data_tones
    n = tones.size
    rng = np.random.default_rng(20261203)
    freq_hz = tones.astype(np.float64) * plan.tone_spacing_hz
    taps = (np.sqrt(10 ** (np.array(EVA_DB) / 10) / 2)
            * (rng.standard_normal(len(EVA_NS)) + 1j * rng.standard_normal(len(EVA_NS))))
    response = np.exp(-2j * np.pi * np.outer(freq_hz, np.array(EVA_NS) * 1e-9)) @ taps
    base_db = 25.0 + 10 * np.log10(np.abs(response) ** 2 / np.mean(np.abs(response) ** 2))
    quarter = slice(0, n // 4)
    notch = slice(120, 128)
    half = slice(n // 2, n)
    fade_phase = rng.uniform(0, 2 * np.pi, n - n // 2)
    with RecordWriter(path, topics=[codec.TOPIC_ESTIMATE]) as out:
        for i in range(1500):
            t = i * FRAME_S
            if 20.0 <= t < 21.5:      # a hole: the receiver was off (fallback map)
                continue
            snr = base_db + rng.normal(0.0, 1.0, n)
            if 4.0 <= t < 8.0:        # a partial-band fade
                snr[quarter] -= 10.0
            if 10.0 <= t:             # the whole band drifts down, then stays
                snr -= 0.4 * min(t - 10.0, 6.0)
            if 12.0 <= t:             # a deep notch appears and stays
                snr[notch] -= 15.0
            if 24.0 <= t < 28.0:      # a faster fade on half the band
                snr[half] -= 4.0 + 4.0 * np.sin(2 * np.pi * 0.7 * (t - 24.0) + fade_phase)
            if 28.0 <= t:             # recovery: the drift goes away
                snr += 2.4
            if i % 97 == 13:          # impulse noise: most tones thrown far off
                hit = rng.random(n) < 0.7
                snr[hit] += rng.choice([-12.0, 12.0], hit.sum())
            valid = True
            if i == 1100:             # a damaged estimate: not finite
                snr[5] = np.nan
            if i == 1125:             # the source marked it unusable
                valid = False
            noise = np.full(n, 1e-3, dtype=np.float32)
            channel = np.sqrt(noise * 10 ** (np.nan_to_num(snr) / 10)).astype(np.complex64)
            out.write(codec.TOPIC_ESTIMATE, Estimate(
                frame=i, time_s=t, plan_id=plan.plan_id, tone_index=tones, channel=channel,
                noise_var=noise, snr_db=snr.astype(np.float32), valid=valid))


def result_digest(result: OfflineResult, *, epoch: str | None = None) -> str:
    """SHA-256 of everything a replay hands on (maps as encoded; ``epoch`` replaces theirs)."""
    h = hashlib.sha256()
    for m in result.maps:
        if epoch is not None:
            m = dataclasses.replace(m, epoch=epoch)
        for part in codec.encode(codec.TOPIC_MAP, m):
            h.update(bytes(part))
    tl = result.timeline
    for arr in (tl.frame, tl.time_s, tl.bits_per_symbol, tl.margin_db, tl.live_margin_db,
                tl.seq, tl.fallback):
        h.update(np.ascontiguousarray(arr).tobytes())
    h.update("\n".join(tl.kind).encode())
    h.update("\n".join(tl.reason).encode())
    h.update(repr(result.events).encode())
    h.update(repr(result.summary).encode())
    return h.hexdigest()


@pytest.fixture(scope="module")
def eventful(tmp_path_factory) -> Path:
    path = tmp_path_factory.mktemp("digest") / "eventful.brlog"
    _write_eventful(path)
    return path


@pytest.fixture(scope="module")
def digests(eventful) -> dict[str, str]:
    out = {}
    for name, (settings, _pinned) in CASES.items():
        if name == "demo":
            out[name] = result_digest(replay_offline(DEMO_CONFIG, DEMO, overrides=settings))
        else:
            result = replay_offline(None, eventful, overrides={**PLAN, **settings})
            out[name] = result_digest(result, epoch="digest")
    return out


def test_the_eventful_recording_exercises_every_path(eventful):
    """The settings cases are only worth their digest if the recording makes them work."""
    result = replay_offline(None, eventful, overrides=PLAN)
    kinds = result.summary.maps_by_kind
    assert {"bit_swap", "reload", "fallback"} <= set(kinds)
    assert result.summary.rejected.get("frame_outlier", 0) > 0
    assert result.summary.rejected.get("non_finite") == 1
    assert result.summary.rejected.get("invalid") == 1
    assert math.isfinite(result.summary.live_margin_min_db)


@pytest.mark.parametrize("name", list(CASES))
def test_replay_digest_is_unchanged(name, digests):
    pinned = {n: pin for n, (_s, pin) in CASES.items()}
    assert digests[name].startswith(pinned[name]) and pinned[name], (
        f"digest of {name} changed; all current digests (first 16 hex digits): "
        + ", ".join(f"{n}: {d[:16]}" for n, d in digests.items()))
