"""Regenerate replay/link-demo.sigmf-* : a short simulated IQ capture for the IQ driver demo.

Invented scenario: a cabled bench link at the Kestrel Yard workshop, seen through an EPA-like
multipath emulator at 25 dB SNR with a 1.5 kHz offset; at 0.3 s the emulator fades tones 20..60
by 12 dB. Default link plan, default map (QPSK), 30 frames, ci16. Reproducible (seed 7): the data file
and the metadata (with its core:sha512 and the brimline:tone_plan extension) come out byte for
byte the same on every run.

    python replay/make_link_capture.py
"""

from pathlib import Path

from brimline.drivers.link.frame import make_plan
from brimline.daemon.wire.sigmf import write_sigmf
from brimline.drivers.sources.sim import SimDriver

HERE = Path(__file__).resolve().parent


def main() -> None:
    plan = make_plan()
    sim = SimDriver(plan=plan, profile="epa", doppler_hz=5.0, snr_db=25.0, cfo_hz=1500.0,
                    seed=7, realtime=False,
                    events=[{"start_s": 0.3, "first_tone": 20, "last_tone": 60,
                             "depth_db": 12.0}])
    samples = sim.capture(30, gap_samples=700) * 0.1  # leave headroom below ci16 full scale
    write_sigmf(HERE / "link-demo", samples, sample_rate_hz=plan.sample_rate_hz,
                datatype="ci16_le", plan=plan,
                description="brimline demo: simulated bench link (invented scenario), default "
                            "link plan and map, 30 frames at 50 frames/s channel time, frames "
                            "packed with 700-sample gaps; band fade of tones 20..60 from 0.3 s")


if __name__ == "__main__":
    main()
