"""Channel simulator: tapped-delay-line fading, noise, frequency offset and test impairments.

Profiles are the published tapped delay lines (delays in seconds, relative powers in dB),
normalized to unit total power. Every tap is Rayleigh with the classical (Clarke/Jakes) Doppler
spectrum, generated as a sum of sinusoids with random arrival angles (ensemble autocorrelation
exactly ``J0(2 pi f_D tau)``). Fractional tap delays become windowed-sinc interpolation filters on
the sample grid; the true per-tone response is that of the filters actually applied, so tests can
compare the receiver's estimates against it.

A frame passes, in order: band fades (symbol by symbol, in the frequency domain), the tapped
delay line (gains at symbol boundaries, linear in between), the slow gain drift, the frequency
offset, a random lead of noise-only samples (timing offset), the narrowband interferer (switched
sample by sample in channel time) and AWGN. :meth:`LinkChannel.truth` is the fast path for tests:
the exact per-tone response of the filters applied, noise plus interference, and SNR.

All randomness comes from the numpy Generator passed in; the same seed gives the same samples.
Scaling follows the link model's unitary convention: noise of variance ``10**(-snr_db/10)`` per
complex sample gives a per-tone SNR of ``snr_db`` for a unit-power tone on a unit channel.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from brimline.daemon.records import TonePlan

__all__ = [
    "Profile",
    "PROFILES",
    "profile",
    "rms_delay_spread_s",
    "FadeEvent",
    "FadingTaps",
    "LinkChannel",
    "Truth",
    "check_interferer_window",
]


def check_interferer_window(start_s: float | None, stop_s: float | None, *, prefix: str = "",
                            error: type[Exception] = ValueError) -> None:
    """The interferer's switch-off time must be after its switch-on time (None: no limit).

    The one check of the window, for :class:`LinkChannel`, the simulator driver and the
    ``driver.sim`` config section; ``prefix`` names the section in the message.
    """
    if start_s is not None and stop_s is not None and not stop_s > start_s:
        raise error(f"{prefix}interferer_stop_s={stop_s} must be after "
                    f"{prefix}interferer_start_s={start_s}")


@dataclass(frozen=True)
class Profile:
    """A tapped-delay-line multipath profile.

    Attributes
    ----------
    name : str
        Short key used in configs.
    delays_s : tuple of float
        Tap delays in seconds.
    powers_db : tuple of float
        Relative tap powers in dB.
    source : str
        Where the table is published.
    fading : bool
        Whether the taps fade (False: fixed unit gains, the AWGN reference channel).
    """

    name: str
    delays_s: tuple
    powers_db: tuple
    source: str
    fading: bool = True

    @property
    def powers_lin(self) -> np.ndarray:
        """Tap powers, linear, normalized to sum 1."""
        p = 10.0 ** (np.asarray(self.powers_db) / 10.0)
        return p / p.sum()


def _ns(*values):
    return tuple(v * 1e-9 for v in values)


_3GPP = "3GPP TS 36.101 Annex B.2, Table B.2.1-"
_ITU = "ITU-R M.1225 (1997), tapped-delay-line tables"

#: Published profiles by config key.
PROFILES: dict[str, Profile] = {p.name: p for p in (
    Profile("awgn", (0.0,), (0.0,), "single fixed tap (noise only)", fading=False),
    Profile("flat", (0.0,), (0.0,), "single Rayleigh tap (flat fading)"),
    Profile("epa", _ns(0, 30, 70, 90, 110, 190, 410),
            (0.0, -1.0, -2.0, -3.0, -8.0, -17.2, -20.8), _3GPP + "2 (EPA)"),
    Profile("eva", _ns(0, 30, 150, 310, 370, 710, 1090, 1730, 2510),
            (0.0, -1.5, -1.4, -3.6, -0.6, -9.1, -7.0, -12.0, -16.9), _3GPP + "3 (EVA)"),
    Profile("etu", _ns(0, 50, 120, 200, 230, 500, 1600, 2300, 5000),
            (-1.0, -1.0, -1.0, 0.0, 0.0, 0.0, -3.0, -5.0, -7.0), _3GPP + "4 (ETU)"),
    Profile("ped_a", _ns(0, 110, 190, 410), (0.0, -9.7, -19.2, -22.8), _ITU + ", Pedestrian A"),
    Profile("ped_b", _ns(0, 200, 800, 1200, 2300, 3700),
            (0.0, -0.9, -4.9, -8.0, -7.8, -23.9), _ITU + ", Pedestrian B"),
    Profile("veh_a", _ns(0, 310, 710, 1090, 1730, 2510),
            (0.0, -1.0, -9.0, -10.0, -15.0, -20.0), _ITU + ", Vehicular A"),
    Profile("indoor_a", _ns(0, 50, 110, 170, 290, 310),
            (0.0, -3.0, -10.0, -18.0, -26.0, -32.0), _ITU + ", Indoor office A"),
)}


def profile(name: str) -> Profile:
    """Look up a profile by key; ``ValueError`` names the key and the choices."""
    try:
        return PROFILES[name]
    except KeyError:
        raise ValueError(f"profile={name!r} is not one of {sorted(PROFILES)}") from None


def rms_delay_spread_s(prof: Profile) -> float:
    """RMS delay spread in seconds: the power-weighted standard deviation of the tap delays."""
    p = prof.powers_lin
    tau = np.asarray(prof.delays_s)
    mean = float(np.sum(p * tau))
    return math.sqrt(max(float(np.sum(p * tau * tau)) - mean * mean, 0.0))


class FadingTaps:
    """Rayleigh tap gains with the classical Doppler spectrum (sum of sinusoids).

    ``g_i(t) = sqrt(P_i / M) * sum_m exp(j (2 pi f_D cos(alpha_im) t + phi_im))`` with arrival
    angles ``alpha`` and phases ``phi`` uniform and independent, drawn once from ``rng``.

    Parameters
    ----------
    powers_lin : array_like
        Mean power of each tap (linear).
    doppler_hz : float
        Maximum Doppler shift in hertz (0 gives a static random channel).
    rng : numpy.random.Generator
        Source of the angles and phases.
    n_sinusoids : int
        Sinusoids per tap (more: closer to Gaussian).
    fading : bool
        False gives constant gains ``sqrt(P_i)`` (no fading).

    Notes
    -----
    Clarke's model; the random-angle sum of sinusoids has ensemble autocorrelation
    ``E[g(t) g*(t + tau)] = P J0(2 pi f_D tau)`` for any number of sinusoids.
    """

    def __init__(self, powers_lin, *, doppler_hz: float, rng: np.random.Generator,
                 n_sinusoids: int = 32, fading: bool = True) -> None:
        p = np.asarray(powers_lin, dtype=np.float64)
        self.fading = bool(fading)
        self.amplitude = np.sqrt(p / n_sinusoids)[:, None]
        self.doppler_hz = float(doppler_hz)
        self._freq = self.doppler_hz * np.cos(rng.uniform(0, 2 * np.pi, (p.size, n_sinusoids)))
        self._phase = rng.uniform(0, 2 * np.pi, (p.size, n_sinusoids))

    def __call__(self, t_s) -> np.ndarray:
        """Complex gains, shape (taps, len(t_s)), at times ``t_s`` in seconds."""
        t = np.atleast_1d(np.asarray(t_s, dtype=np.float64))
        if not self.fading:
            return np.repeat(self.amplitude * math.sqrt(self._freq.shape[1]), t.size, axis=1)
        arg = self._freq[:, :, None] * (2 * np.pi * t) + self._phase[:, :, None]
        return (self.amplitude[:, :, None] * np.exp(1j * arg)).sum(axis=1)


@dataclass(frozen=True)
class FadeEvent:
    """A sudden fade of a band of tones, for adaptation tests.

    Attributes
    ----------
    start_s : float
        Simulated time the fade begins, seconds.
    stop_s : float
        Time it ends (``inf``: never).
    first_tone, last_tone : int
        Signed FFT bins, inclusive, of the faded band.
    depth_db : float
        Attenuation in dB (positive numbers fade).
    """

    start_s: float
    first_tone: int
    last_tone: int
    depth_db: float
    stop_s: float = math.inf

    def active(self, t_s: float) -> bool:
        """Whether the fade applies at time ``t_s``."""
        return self.start_s <= t_s < self.stop_s


@dataclass(frozen=True)
class Truth:
    """The channel a frame really saw, per data tone (for tests and estimator benchmarks).

    Attributes
    ----------
    channel : ndarray of complex
        Frequency response per data tone (bulk filter delay removed; the receiver's estimate may
        differ by a linear phase from its timing choice, so compare magnitudes).
    noise_var : ndarray of float
        Noise plus interference variance per data tone.
    snr_db : ndarray of float
        ``10 log10(|channel|^2 / noise_var)`` at nominal power.
    """

    channel: np.ndarray
    noise_var: np.ndarray
    snr_db: np.ndarray


@dataclass
class LinkChannel:
    """Everything between transmitter and receiver, for one plan.

    Parameters
    ----------
    plan : TonePlan
        Tone plan (FFT size, cyclic prefix, sample rate; symbol timing for fade events).
    profile : str
        Multipath profile key (:data:`PROFILES`).
    doppler_hz : float
        Maximum Doppler shift in hertz.
    snr_db : float
        Per-tone SNR on a unit channel at nominal power, dB (sets the noise variance).
    cfo_hz : float
        Carrier frequency offset applied to the signal, hertz.
    lead_max_samples : int
        Each frame starts after a random 0..lead_max_samples of noise (timing offset).
    interferer_tone : float or None
        Signed tone position (may be fractional) of a continuous narrowband interferer.
    interferer_db : float
        Interferer power relative to a nominal tone's power, dB.
    interferer_start_s, interferer_stop_s : float or None
        The interferer is on from ``interferer_start_s`` (None: from the start) until before
        ``interferer_stop_s`` (None: for ever), simulated time in seconds (the clock of the
        fade events), switched sample by sample.
    drift_db, drift_period_s : float
        Slow sinusoidal gain drift: peak deviation in dB and period in seconds.
    events : list of FadeEvent
        Sudden band fades.
    rng : numpy.random.Generator
        Source of all randomness.
    """

    plan: TonePlan
    profile: str = "awgn"
    doppler_hz: float = 0.0
    snr_db: float = 30.0
    cfo_hz: float = 0.0
    lead_max_samples: int = 0
    interferer_tone: float | None = None
    interferer_db: float = 0.0
    interferer_start_s: float | None = None
    interferer_stop_s: float | None = None
    drift_db: float = 0.0
    drift_period_s: float = 60.0
    events: list = field(default_factory=list)
    rng: np.random.Generator = None
    filter_half_len: int = 8

    def __post_init__(self) -> None:
        if self.rng is None:
            raise ValueError("LinkChannel needs rng (a seeded numpy Generator)")
        check_interferer_window(self.interferer_start_s, self.interferer_stop_s)
        prof = profile(self.profile)
        fs = self.plan.sample_rate_hz
        self._prof = prof
        self.taps = FadingTaps(prof.powers_lin, doppler_hz=self.doppler_hz, rng=self.rng,
                               fading=prof.fading)
        self.noise_var = 10.0 ** (-self.snr_db / 10.0)
        self.events = [e if isinstance(e, FadeEvent) else FadeEvent(**e) for e in self.events]
        # One windowed-sinc filter per tap, all centred filter_half_len samples late.
        delays = np.asarray(prof.delays_s) * fs
        half = self.filter_half_len
        length = int(math.ceil(delays.max())) + 2 * half + 1
        m = np.arange(length)[None, :] - half - delays[:, None]
        window = np.where(np.abs(m) <= half, np.cos(np.pi * m / (2 * half + 2)) ** 2, 0.0)
        self.filters = np.sinc(m) * window
        self.bulk_delay = half
        self._interferer_phase = float(self.rng.uniform(0, 2 * np.pi))

    # ------------------------------------------------------------------ pieces

    def gain_lin(self, t_s: float) -> float:
        """Amplitude factor of the slow gain drift at time ``t_s``."""
        if self.drift_db == 0.0:
            return 1.0
        db = self.drift_db * math.sin(2 * math.pi * t_s / self.drift_period_s)
        return 10.0 ** (db / 20.0)

    def fade_mask(self, tones: np.ndarray, t_s: float) -> np.ndarray:
        """Amplitude factor per signed bin from the fade events active at ``t_s``."""
        mask = np.ones(np.shape(tones))
        for ev in self.events:
            if ev.active(t_s):
                band = (tones >= ev.first_tone) & (tones <= ev.last_tone)
                mask[band] *= 10.0 ** (-ev.depth_db / 20.0)
        return mask

    def response(self, tones: np.ndarray, t_s: float) -> np.ndarray:
        """True frequency response at signed bins ``tones`` and time ``t_s`` (all effects)."""
        n = self.plan.fft_size
        tones = np.asarray(tones, dtype=np.float64)
        k = np.arange(self.filters.shape[1]) - self.bulk_delay
        per_tap = self.filters @ np.exp(-2j * np.pi * np.outer(k, tones) / n)
        g = self.taps([t_s])[:, 0]
        return self.gain_lin(t_s) * self.fade_mask(tones, t_s) * (g @ per_tap)

    def interferer_on(self, t_s: np.ndarray | float) -> np.ndarray | bool:
        """Whether the interferer is on at time(s) ``t_s`` (seconds)."""
        t_s = np.asarray(t_s, dtype=np.float64)
        on = np.ones(t_s.shape, bool)
        if self.interferer_start_s is not None:
            on &= t_s >= self.interferer_start_s
        if self.interferer_stop_s is not None:
            on &= t_s < self.interferer_stop_s
        return on if on.ndim else bool(on)

    def interference_var(self, tones: np.ndarray, t_s: float | None = None) -> np.ndarray:
        """Interferer power per signed bin (leakage of a tone at a fractional position), at time
        ``t_s`` (None: whenever it is on)."""
        if self.interferer_tone is None or (t_s is not None and not self.interferer_on(t_s)):
            return np.zeros(np.shape(tones))
        n = self.plan.fft_size
        delta = np.asarray(tones, dtype=np.float64) - self.interferer_tone
        # Unitary-DFT leakage of a complex exponential: |sin(pi d) / (N sin(pi d / N))|^2.
        num = np.sin(np.pi * delta)
        den = n * np.sin(np.pi * delta / n)
        leak = np.where(np.abs(den) < 1e-12, 1.0, (num / np.where(den == 0, 1, den)) ** 2)
        return 10.0 ** (self.interferer_db / 10.0) * leak

    def truth(self, t_s: float) -> Truth:
        """Per-data-tone channel, noise variance and SNR of a frame sent at ``t_s``."""
        tones = self.plan.data_tones
        h = self.response(tones, t_s)
        nv = self.noise_var + self.interference_var(tones, t_s)
        return Truth(channel=h, noise_var=nv,
                     snr_db=10.0 * np.log10(np.abs(h) ** 2 / nv))

    # ------------------------------------------------------------------ time domain

    def transmit(self, samples: np.ndarray, t_s: float, *, tail_samples: int = 0) -> np.ndarray:
        """Pass one frame's samples through the channel.

        Parameters
        ----------
        samples : ndarray of complex
            Transmitted frame, starting on a symbol boundary.
        t_s : float
            Simulated time of the first sample, seconds.
        tail_samples : int
            Extra noise-only samples appended after the frame.

        Returns
        -------
        ndarray of complex64
            Received block: random lead of noise, faded frame, filter tail and ``tail_samples``.
        """
        plan, fs = self.plan, self.plan.sample_rate_hz
        x = np.asarray(samples, dtype=np.complex128)
        if any(ev.active(t_s) for ev in self.events):
            x = self._apply_fades(x, t_s)
        # Time-varying tapped delay line: gains at symbol boundaries, linear in between.
        step = plan.symbol_len
        pos = np.arange(x.size + self.filters.shape[1] - 1)
        g = self.taps(t_s + np.arange(pos.size // step + 2) * step / fs)
        j, w = pos // step, (pos % step) / step
        gains = g[:, j] * (1.0 - w) + g[:, j + 1] * w
        y = np.zeros(pos.size, np.complex128)
        for i in range(self.filters.shape[0]):  # a handful of taps; each is one convolution
            y += gains[i] * np.convolve(x, self.filters[i])
        y *= self.gain_lin(t_s)
        if self.cfo_hz:
            y *= np.exp(2j * np.pi * self.cfo_hz * (t_s + pos / fs))
        lead = int(self.rng.integers(0, self.lead_max_samples + 1)) if self.lead_max_samples else 0
        out = np.zeros(lead + y.size + int(tail_samples), np.complex128)
        out[lead:lead + y.size] = y
        if self.interferer_tone is not None:
            n = np.arange(out.size)
            amp = math.sqrt(10.0 ** (self.interferer_db / 10.0) / plan.fft_size)
            phase = 2 * np.pi * self.interferer_tone * (t_s * fs + n - lead) / plan.fft_size
            tone = amp * np.exp(1j * (phase + self._interferer_phase))
            if self.interferer_start_s is not None or self.interferer_stop_s is not None:
                tone *= self.interferer_on(t_s + (n - lead) / fs)
            out += tone
        sigma = math.sqrt(self.noise_var / 2.0)
        out += sigma * (self.rng.standard_normal(out.size) + 1j * self.rng.standard_normal(out.size))
        return out.astype(np.complex64)

    def _apply_fades(self, x: np.ndarray, t_s: float) -> np.ndarray:
        """Scale faded bins symbol by symbol (exact for a receiver timed inside the prefix)."""
        n, cp, s = self.plan.fft_size, self.plan.cp_len, self.plan.symbol_len
        n_sym = x.size // s
        sym = x[:n_sym * s].reshape(n_sym, s)
        bins = np.fft.fftfreq(n, 1.0 / n)
        spec = np.fft.fft(sym[:, cp:], axis=1) * self.fade_mask(bins, t_s)
        body = np.fft.ifft(spec, axis=1)
        out = x.copy()
        out[:n_sym * s] = np.concatenate([body[:, n - cp:], body], axis=1).ravel()
        return out
