"""Write replay/kestrel_lowmarsh_estimates.brlog, the estimate recording config/replay.yaml plays.

The recording is simulated, in the invented scenario of config/demo.yaml (the Kestrel Ridge
field hut to Lowmarsh relay mast test link): the same tone plan, channel and events, run
open loop (the transmitter keeps its default map) and as fast as the simulator goes. To show
the daemon's fallback, the estimates of 16.0 s to 17.5 s are left out, as if the receiver had
been switched off while the hut's generator was swapped.

Reproducible: the simulation is seeded from the config, so running this again writes the same
estimates (only the recording's creation time in its meta record differs).

    python replay/make_estimate_log.py [--frames N] [--out PATH]
"""

from __future__ import annotations

import argparse
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent

GAP_S = (16.0, 17.5)


def main(argv=None) -> int:
    from brimline.daemon.runtime.config import load_config
    from brimline.daemon.wire import codec
    from brimline.daemon.wire.recording import RecordWriter
    from brimline.drivers.link.frame import make_plan
    from brimline.drivers.sources.sim import SimDriver

    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--frames", type=int, default=1000, help="frames to simulate")
    parser.add_argument("--out", type=Path, default=HERE / "kestrel_lowmarsh_estimates.brlog")
    args = parser.parse_args(argv)

    cfg = load_config(ROOT / "config" / "demo.yaml")
    plan = make_plan(**cfg.link.model_dump())
    sim = cfg.driver.sim.model_dump()
    sim.update(realtime=False, max_frames=args.frames)
    if args.out.exists():
        args.out.unlink()
    kept = 0
    meta = {"scenario": "Kestrel Ridge hut -> Lowmarsh mast (simulated, invented)",
            "made_by": "replay/make_estimate_log.py", "gap_s": list(GAP_S)}
    with SimDriver(plan=plan, **sim) as drv, \
            RecordWriter(args.out, topics=[codec.TOPIC_ESTIMATE], meta=meta) as out:
        for est in drv.frames():
            if GAP_S[0] <= est.time_s < GAP_S[1]:
                continue
            out.write(codec.TOPIC_ESTIMATE, est)
            kept += 1
    print(f"{args.out}: {kept} estimates, {args.out.stat().st_size / 1e6:.2f} MB")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
