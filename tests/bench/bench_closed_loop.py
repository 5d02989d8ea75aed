"""Benchmarks of the closed loop (part "closed_loop"): what adaptive loading delivers.

Every figure comes from seeded closed-loop runs in this process
(:func:`brimline.drivers.sources.closed_loop.run_closed_loop`): the link model's transmitter,
channel simulator and receiver, the payload checked by its CRC-32, the daemon's link
controller called directly with each estimate and its time (no sockets). The adaptive link
uses the daemon's defaults (estimator, change control, lead frames, the outer margin loop with
the target below) and a loader whose target symbol error rate gives the target frame error rate
for a full frame (no coding gain: the link model is uncoded, so its errors are real errors).
The closed-loop runner acknowledges each map at the frame it came into force (the controller's
lead follows from that, as from a follower's acks) and reports each frame's decoded outcome to
the outer loop before the frame's estimate, as the receiver side would.

* Target frame error rate 0.1: the block error rate the CQI of 3GPP TS 36.213 sec. 7.2.3 is
  defined for (common practice for link adaptation).
* Demo frame rate: 50 frames per second (config/demo.yaml); 15 kHz tones, 174 data tones,
  12 data symbols per frame.
* Oracle: the same loader on the simulator's true per-tone SNR of the frame being sent (no
  delay, no estimation noise), with the least extra margin (0.5 dB steps) that meets the target
  on the same realisation (:func:`~brimline.drivers.sources.closed_loop.best_oracle`: the
  receiver does not deliver the true SNR).
* Best fixed: the one constellation on every tone at flat power with the most goodput that
  meets the target on the same realisation
  (:func:`~brimline.drivers.sources.closed_loop.best_fixed`).
* ``outer_loop_fer_error``: the outer loop on decoded frames. Frozen EVA at 20 dB; the loader
  has no target margin (``margin_db: 0``) and claims a 3 dB coding gain the uncoded link does
  not have (a gap 3 dB too optimistic); the figure is |FER - target| / target over the frames
  after the first quarter of the run.
"""

from __future__ import annotations

import math

import numpy as np

from brimline.daemon.core.change import ChangeControl
from brimline.daemon.core.controller import LinkController
from brimline.daemon.core.estimator import Estimator
from brimline.daemon.core.outer import OuterLoop
from brimline.daemon.runtime.config import (
    ChangeSection,
    EstimatorSection,
    LoadingSection,
    OuterSection,
    ServiceSection,
)
from brimline.drivers.air.channel import FadeEvent
from brimline.drivers.link.frame import make_plan
from brimline.drivers.sources.closed_loop import (
    FixedMaps,
    best_fixed,
    best_oracle,
    frame_ser_target,
    run_closed_loop,
)
from brimline.drivers.sources.sim import SimDriver

TARGET_FER = 0.1
FPS = 50.0
CONFIRM_FRAMES = EstimatorSection().confirm_frames
LEAD_FRAMES = ServiceSection().lead_frames
STEP_BOUND = CONFIRM_FRAMES + LEAD_FRAMES + 2
#: Extra margins (dB, on top of the loader's default margin) the oracle is searched over: it may
#: need less margin than an estimating link.
ORACLE_EXTRA_DB = np.arange(-LoadingSection().margin_db, 5.01, 0.5)

GOALS = {
    "closed_loop_vs_oracle": ">= 0.90 (goodput / oracle goodput; EVA, 1 Hz Doppler, 20 dB mean "
                             "SNR, 50 frames/s, target FER 0.1)",
    "closed_loop_vs_oracle_5hz": "info: the same at 5 Hz Doppler",
    "closed_loop_vs_oracle_lead1": "info: closed_loop_vs_oracle with lead_frames 1 from the "
                                   "start (the lead measured from acks starts at the default)",
    "closed_loop_fer_lead1": "info: its frame error rate",
    "closed_loop_vs_oracle_seed5": "info: closed_loop_vs_oracle on another realisation (seed 5)",
    "closed_loop_fer_seed5": "info: its frame error rate",
    "closed_loop_vs_oracle_open": "info: closed_loop_vs_oracle without the outer loop",
    "closed_loop_fer_open": "info: its frame error rate",
    "closed_loop_offset_db": "info: the outer loop's offset at the end of the EVA 1 Hz run, dB",
    "closed_loop_lead_frames": "info: the lead in use at the end of the EVA 1 Hz run, frames",
    "closed_loop_fer": "<= 1.2 x closed_loop_fer_target (the EVA 1 Hz run's frame error rate)",
    "closed_loop_fer_target": "info: the target frame error rate (3GPP TS 36.213 7.2.3: 0.1)",
    "closed_loop_fer_5hz": "info: frame error rate of the 5 Hz run",
    "closed_loop_ber": "info: bit error rate of the EVA 1 Hz run",
    "closed_loop_maps_per_min": "info: maps brought into force per minute, EVA 1 Hz run",
    "oracle_extra_margin_db": "info: margin the oracle needs on the true SNR to meet the "
                              "target (EVA 1 Hz), relative to loading.margin_db",
    "closed_loop_vs_fixed": ">= 1.5 (goodput / best fixed goodput; static ETU, 25 dB, "
                            "narrowband interferer 5 dB below a tone at tone 40.5; inf when "
                            "no fixed constellation meets the target)",
    "closed_loop_fixed_bits": "info: bits of the best fixed constellation (0: none meets it)",
    "closed_loop_vs_fixed_any": "info: goodput / the most goodput any fixed constellation "
                                "delivers, target or not",
    "closed_loop_fer_etu": "info: frame error rate of the adaptive ETU run",
    "adapt_frames_step": f"<= {STEP_BOUND} (confirm {CONFIRM_FRAMES} + lead {LEAD_FRAMES} + 2; "
                         "frames from a 10 dB drop of tones -60..-31 until the transmitter "
                         "applies the new map; static EVA, 25 dB)",
    "adapt_errored_frames_step": f"<= {STEP_BOUND} (frames lost meanwhile)",
    "outer_loop_fer_error": "<= 0.25 (|FER - 0.1| / 0.1 on decoded frames; frozen EVA, 20 dB, "
                            "margin 0 dB and a claimed 3 dB coding gain the link lacks)",
    "outer_loop_fer": "info: that run's frame error rate (target 0.1)",
    "outer_loop_fer_open": "info: the same without the outer loop",
    "outer_loop_offset_db": "info: the outer loop's offset at the end of that run, dB",
}


def _loader(extra_db: float = 0.0, plan=None, coding_gain_db: float = 0.0):
    plan = plan or make_plan()
    ser = frame_ser_target(TARGET_FER, plan.data_symbols * plan.data_tones.size)
    margin_db = LoadingSection().margin_db + extra_db
    return LoadingSection(target_ser=ser, coding_gain_db=coding_gain_db,
                          margin_db=margin_db).loader()


def _controller(plan, loader, lead_frames: int = LEAD_FRAMES, outer: bool = True,
                ) -> LinkController:
    est = Estimator(**EstimatorSection().model_dump())
    change = ChangeControl(loader, **ChangeSection().model_dump())
    loop = OuterLoop(**OuterSection(target_fer=TARGET_FER).model_dump()) if outer else None
    return LinkController(plan, est, change, gap_db=loader.gap_db, epoch="bench",
                          lead_frames=lead_frames, outer=loop)


def _adaptive(kw: dict, n_frames: int, lead_frames: int = LEAD_FRAMES, outer: bool = True,
              loader=None, controllers: list | None = None):
    with SimDriver(**kw) as sim:
        ctl = _controller(sim.plan, loader or _loader(), lead_frames, outer)
        if controllers is not None:
            controllers.append(ctl)
        return run_closed_loop(sim, n_frames, controller=ctl)


def _outer_decoded(n_frames: int, outer: bool = True) -> tuple[float, float]:
    """Frame error rate over the last three quarters of a frozen EVA run whose loader is 3 dB
    too optimistic, and the outer loop's offset at the end."""
    kw = dict(plan=make_plan(), profile="eva", doppler_hz=0.0, snr_db=20.0, realtime=False,
              seed=13, frame_rate_hz=FPS)
    ctls: list = []
    loader = _loader(-LoadingSection().margin_db, coding_gain_db=3.0)
    fig = _adaptive(kw, n_frames, outer=outer, loader=loader, controllers=ctls)
    fer = float(np.mean(~fig.delivered[n_frames // 4:]))
    offset = ctls[0].outer.offset_db(n_frames / FPS) if outer else 0.0
    return fer, offset


def _vs_oracle(kw: dict, n_frames: int, controllers: list | None = None):
    adaptive = _adaptive(kw, n_frames, controllers=controllers)
    extra, oracle = best_oracle(lambda: SimDriver(**kw), _loader, n_frames, TARGET_FER,
                                extra_margins_db=ORACLE_EXTRA_DB)
    ratio = math.inf if oracle is None else adaptive.goodput_bps / oracle.goodput_bps
    return adaptive, ratio, (math.nan if extra is None else extra), oracle


def _vs_fixed(n_frames: int) -> dict:
    kw = dict(plan=make_plan(), profile="etu", doppler_hz=0.0, snr_db=25.0, realtime=False,
              seed=7, frame_rate_hz=FPS, interferer_tone=40.5, interferer_db=-5.0)
    adaptive = _adaptive(kw, n_frames)
    bits, fixed = best_fixed(lambda: SimDriver(**kw), n_frames, TARGET_FER, range(1, 11))
    any_best = 0.0
    for b in (1, 2):  # the most goodput at any error rate: a low order (the others lose all)
        with SimDriver(**kw) as sim:
            fig = run_closed_loop(sim, n_frames // 2, provider=FixedMaps(sim.plan, b))
        any_best = max(any_best, fig.goodput_bps)
    return {
        "closed_loop_vs_fixed": (math.inf if fixed is None or fixed.goodput_bps == 0
                                 else adaptive.goodput_bps / fixed.goodput_bps),
        "closed_loop_fixed_bits": float(bits or 0),
        "closed_loop_vs_fixed_any": (math.inf if any_best == 0
                                     else adaptive.goodput_bps / any_best),
        "closed_loop_fer_etu": adaptive.frame_error_rate,
    }


def _step(settle_s: float, after_s: float) -> dict:
    """A 10 dB drop of 30 tones on a static channel once the maps have settled."""
    drop_s = settle_s
    first, last = -60, -31
    kw = dict(plan=make_plan(), profile="eva", doppler_hz=0.0, snr_db=25.0, realtime=False,
              seed=11, frame_rate_hz=FPS,
              events=[FadeEvent(start_s=drop_s, first_tone=first, last_tone=last,
                                depth_db=10.0)])
    fig = _adaptive(kw, int((settle_s + after_s) * FPS))
    k0 = int(math.ceil(drop_s * FPS))  # first frame sent into the drop
    seq_before = fig.sent_seq[k0 - 1]
    later = np.flatnonzero(fig.sent_seq[k0:] != seq_before)
    frames = int(later[0]) if later.size else len(fig.sent_seq) - k0
    errored = int(np.count_nonzero(~fig.delivered[k0:k0 + frames]))
    return {"adapt_frames_step": float(frames), "adapt_errored_frames_step": float(errored)}


def run(quick: bool) -> dict[str, float]:
    n = 150 if quick else 1500
    figures: dict[str, float] = {}
    eva = dict(plan=make_plan(), profile="eva", snr_db=20.0, realtime=False, seed=3,
               frame_rate_hz=FPS)
    ctls: list = []
    adaptive, ratio, extra, oracle = _vs_oracle({**eva, "doppler_hz": 1.0}, n, ctls)
    figures["closed_loop_vs_oracle"] = ratio
    figures["closed_loop_fer"] = adaptive.frame_error_rate
    figures["closed_loop_offset_db"] = ctls[0].outer.offset_db(n / FPS)
    figures["closed_loop_lead_frames"] = float(ctls[0].lead_in_use)
    open_loop = _adaptive({**eva, "doppler_hz": 1.0}, n, outer=False)
    figures["closed_loop_vs_oracle_open"] = (math.inf if oracle is None else
                                             open_loop.goodput_bps / oracle.goodput_bps)
    figures["closed_loop_fer_open"] = open_loop.frame_error_rate
    seed5, ratio5s, _, _ = _vs_oracle({**eva, "doppler_hz": 1.0, "seed": 5}, n)
    figures["closed_loop_vs_oracle_seed5"] = ratio5s
    figures["closed_loop_fer_seed5"] = seed5.frame_error_rate
    figures["closed_loop_fer_target"] = TARGET_FER
    figures["closed_loop_ber"] = adaptive.bit_error_rate
    figures["closed_loop_maps_per_min"] = adaptive.maps_per_min
    figures["oracle_extra_margin_db"] = extra
    quick_loop = _adaptive({**eva, "doppler_hz": 1.0}, n, lead_frames=1)
    figures["closed_loop_vs_oracle_lead1"] = (math.inf if oracle is None else
                                              quick_loop.goodput_bps / oracle.goodput_bps)
    figures["closed_loop_fer_lead1"] = quick_loop.frame_error_rate
    adaptive5, ratio5, _, _ = _vs_oracle({**eva, "doppler_hz": 5.0}, n)
    figures["closed_loop_vs_oracle_5hz"] = ratio5
    figures["closed_loop_fer_5hz"] = adaptive5.frame_error_rate
    figures.update(_vs_fixed(n))
    figures.update(_step(2.0 if quick else 4.0, 1.0))
    fer, offset = _outer_decoded(1000 if quick else 4000)
    figures["outer_loop_fer"] = fer
    figures["outer_loop_fer_error"] = abs(fer - TARGET_FER) / TARGET_FER
    figures["outer_loop_offset_db"] = offset
    figures["outer_loop_fer_open"] = _outer_decoded(400, outer=False)[0]
    return figures


if __name__ == "__main__":
    for key, value in run(quick=True).items():
        print(f"{key:28s} {value:12.4g}   {GOALS[key]}")
