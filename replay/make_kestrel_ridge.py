"""Make replay/kestrel_ridge_snr_db.txt, the per-tone SNR profile of an invented demo link.

Scenario (invented): a 256-tone OFDM link from the Kestrel Ridge field hut to the Lowmarsh relay
mast, 14 km across a valley. A strong echo off the far slope makes the channel frequency
selective with one deep notch, the radio's filters roll off at both band edges, and a narrowband
interferer (a telemetry beacon of the invented Lowmarsh weather station) raises the noise on a
few tones. The numbers are made up for demonstrations; they are not a measurement.

Run ``python replay/make_kestrel_ridge.py`` to regenerate the file byte for byte (seeded).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

N_TONES = 256
SEED = 20261201
OUT = Path(__file__).with_name("kestrel_ridge_snr_db.txt")


def profile(rng: np.random.Generator) -> np.ndarray:
    """Per-tone SNR in dB at nominal power for the invented Kestrel Ridge - Lowmarsh link."""
    k = np.arange(N_TONES)
    # Three paths; delays as fractions of the useful symbol (1 = N_TONES samples).
    gains = np.array([1.0, 0.93 * np.exp(1j * 2.1), 0.35 * np.exp(-1j * 0.7)])
    delays = np.array([0.0, 1.62, 4.3]) / N_TONES
    h = (gains * np.exp(-2j * np.pi * np.outer(k, delays))).sum(axis=1)
    channel_db = 20.0 * np.log10(np.abs(h))
    # Filter roll-off over the outer 20 tones on each side.
    edge = np.minimum(k, N_TONES - 1 - k)
    rolloff_db = -12.0 * np.clip(1.0 - edge / 20.0, 0.0, 1.0) ** 2
    # Noise: flat floor plus the beacon, a narrow bump centred at tone 171.
    noise_db = 10.0 * np.log10(1.0 + 10.0 ** (2.6 - 0.5 * ((k - 171.3) / 1.4) ** 2))
    snr_db = 31.0 + channel_db + rolloff_db - noise_db
    # Estimation scatter of a few frames of pilots.
    snr_db += rng.normal(0.0, 0.4, N_TONES)
    return np.round(snr_db, 2)


def main() -> None:
    snr_db = profile(np.random.default_rng(SEED))
    header = (
        "snr_db  # per-tone SNR at nominal power, invented demo link Kestrel Ridge hut -> "
        "Lowmarsh mast, 256 tones; made by replay/make_kestrel_ridge.py (seeded)"
    )
    lines = [header] + [f"{v:.2f}" for v in snr_db]
    OUT.write_text("\n".join(lines) + "\n", encoding="utf-8")


if __name__ == "__main__":
    main()
