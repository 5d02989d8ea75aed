"""Receiver DSP throughput and SNR-estimate accuracy (1024-point FFT link).

Every time is the median over repeats, the receiver, the bare FFT and the reference called in
turn in one process (so a load change hits all alike and the ratios compare like with like).

* ``rx_msps``: complex samples per second (millions) that ``Receiver.receive`` turns into an
  estimate on one core, sync search over the block included.
* ``rx_msps_vs_ref``: the same in millions of samples per reference time (``reference.py``),
  timed interleaved with the receiver: comparable between machines.
* ``rx_vs_fft``: receiver time over the time of bare ``numpy.fft.fft`` of the same symbols
  (complex64, one batched call), measured in the same process.
* ``rx_demod_vs_fft``: the same with the final data decisions (second, leave-one-out decision
  pass, as the simulator uses to count bit errors); informational.
* ``snr_rmse_db_20``: RMS error (dB) of the per-tone SNR estimate of single frames at a true
  per-tone SNR of 20 dB (AWGN channel, 16-QAM on every data tone).
"""

from __future__ import annotations

import numpy as np
from reference import Reference, interleaved, median

from brimline.drivers.air.channel import LinkChannel
from brimline.drivers.link.frame import Transmitter, make_plan
from brimline.drivers.link.receiver import Receiver

GOALS = {
    "rx_msps": ">= 45 Msample/s per core",
    "rx_msps_vs_ref": "Msamples per reference time (higher is better)",
    "rx_vs_fft": "<= 3.5 x bare FFT time",
    "rx_demod_vs_fft": "informational: estimates plus final data decisions",
    "snr_rmse_db_20": "raw per-tone estimate, one frame (lower is better)",
}

PLAN = dict(fft_size=1024, cp_len=72, sample_rate_hz=15.36e6, used_tones_half=400,
            pilot_spacing=8, train_symbols=2, data_symbols=28)


def run(quick: bool = False) -> dict[str, float]:
    rng = np.random.default_rng(20261201)
    plan = make_plan(**PLAN)
    tx, rx = Transmitter(plan), Receiver(plan)
    bits = np.full(plan.data_tones.size, 4)
    known = (bits, np.ones(bits.size))
    lookup = {1: known}.get
    channel = LinkChannel(plan, profile="awgn", snr_db=20.0, cfo_hz=4.1e3,
                          lead_max_samples=plan.cp_len * 4, rng=rng)
    frames = 4 if quick else 12
    blocks = []
    errors = []
    for i in range(frames):
        sent = tx.frame(bits=bits, power_lin=known[1], map_seq=1, counter=i, rng=rng)
        block = channel.transmit(sent.samples, 0.0, tail_samples=plan.cp_len)
        blocks.append(block)
        res = rx.receive(block, lookup)
        errors.append(res.snr_db - 20.0)
    rmse = float(np.sqrt(np.mean(np.concatenate(errors) ** 2)))

    # Medians over repeats, the four workloads called in turn so that load hits all alike.
    repeats = 80 if quick else 240
    symbols = np.ascontiguousarray(
        blocks[0][:plan.n_symbols * plan.symbol_len].reshape(plan.n_symbols, plan.symbol_len)
        [:, plan.cp_len:])
    ref = Reference()
    t_fft, t_rx, t_demod, t_ref = interleaved([
        lambda: np.fft.fft(symbols, axis=1),
        lambda: rx.receive(blocks[0], lookup, demodulate=False),
        lambda: rx.receive(blocks[0], lookup, demodulate=True),
        ref.work], repeats, statistic=median)
    return {
        "rx_msps": blocks[0].size / t_rx / 1e6,
        "rx_msps_vs_ref": blocks[0].size / t_rx / 1e6 * t_ref,
        "rx_vs_fft": t_rx / t_fft,
        "rx_demod_vs_fft": t_demod / t_fft,
        "snr_rmse_db_20": rmse,
    }


if __name__ == "__main__":
    for key, value in run(quick=True).items():
        print(f"{key:20s} {value:10.4g}   {GOALS[key]}")
