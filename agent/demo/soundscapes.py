"""Synthesized soundscapes for the demo's 3-second audio snippets.

Each sound type is a recipe of band-limited noises, tones and short random
events whose parameters are drawn afresh for every snippet, so that snippets of
one type share their spectral character (and so are learnable as a class) but
no two are alike.  All synthesis is vectorised numpy: noise is shaped directly
in the frequency domain (a complex Gaussian spectrum times a band mask, one
inverse FFT) and repeated events are an impulse train convolved with one event
template.

Sound types (``SOUND_TYPES`` in :mod:`agent.demo.scenario`):

``quiet_room``    a 50 Hz appliance hum with harmonics over a faint noise floor,
                  now and then a soft thump or a ticking clock
``office``        ventilation rumble, keyboard click trains, a distant voice
``cafe``          crowd babble (many amplitude-modulated band-passed noises),
                  cup clinks, the odd hiss of a steam wand
``supermarket``   fridge compressor hum and fan noise, scanner beeps, voices
``sports_music``  music with a beat (kick, hi-hat, bass), hall noise, a whistle
``wind_gulls``    low-passed wind noise with slow gusts, surf, gull-like calls
``vehicle``       engine harmonics at the firing rate plus road noise
``street``        passing traffic, light wind, the occasional horn or voice
"""

from __future__ import annotations

import numpy as np
from scipy.signal import fftconvolve

from .scenario import SOUND_TYPES

# Overall snippet level range per type, in dBFS RMS (quiet rooms are quiet).
LEVEL_DBFS = {
    "quiet_room": (-54.0, -42.0),
    "office": (-46.0, -36.0),
    "cafe": (-32.0, -22.0),
    "supermarket": (-40.0, -30.0),
    "sports_music": (-28.0, -18.0),
    "wind_gulls": (-38.0, -24.0),
    "vehicle": (-32.0, -22.0),
    "street": (-42.0, -30.0),
}


def synthesize(sound_type: str, rng: np.random.Generator, sr: int = 16000,
               duration_s: float = 3.0, channels: int = 1) -> np.ndarray:
    """One snippet of the given sound type.

    Parameters
    ----------
    sound_type : str
        One of ``SOUND_TYPES``.
    rng : numpy.random.Generator
        Source of all randomness (same state, same snippet).
    sr : int
        Sample rate in Hz.
    duration_s : float
        Snippet length in seconds.
    channels : int
        1 (mono) or 2 (stereo: a slightly delayed, decorrelated copy).

    Returns
    -------
    numpy.ndarray
        float32 samples in [-1, 1], shape ``(n,)`` for mono, ``(n, 2)`` for stereo.
    """
    if sound_type not in _RECIPES:
        raise ValueError(f"sound_type must be one of {list(SOUND_TYPES)}, got {sound_type!r}")
    if channels not in (1, 2):
        raise ValueError(f"channels must be 1 or 2, got {channels!r}")
    if sr < 8000:
        raise ValueError(f"sr must be at least 8000 Hz, got {sr!r}")
    n = int(round(sr * duration_s))
    x = _RECIPES[sound_type](_Ctx(rng, n, sr))
    lo, hi = LEVEL_DBFS[sound_type]
    rms = float(np.sqrt(np.mean(x * x))) or 1.0
    x = x * (10.0 ** (rng.uniform(lo, hi) / 20.0) / rms)
    if channels == 2:
        d = int(rng.integers(5, 40))
        x = np.stack([x, 0.75 * x + 0.25 * np.roll(x, d)], axis=1)
    return np.clip(x, -0.99, 0.99).astype(np.float32)


class _Ctx:
    """Shared helpers for one snippet: its rng, length and rate.

    Stationary parts (band noises, steady tones) are summed into one spectrum
    ``S`` and rendered with a single inverse FFT, which is what keeps a snippet
    in the low milliseconds; modulated parts are built in the time domain.
    """

    def __init__(self, rng, n, sr):
        self.rng, self.n, self.sr = rng, n, sr
        self.t = np.arange(n) / sr
        self.f = np.maximum(np.fft.rfftfreq(n, 1.0 / sr), 1e-3)
        self.S = np.zeros(self.f.size, dtype=complex)
        self.P = np.zeros(self.f.size)  # power mask of the stationary noise, drawn once at render

    def _mask(self, lo_hz, hi_hz):
        return _band(self.f, lo_hz, min(hi_hz, 0.45 * self.sr))

    def _cnoise(self, shape):
        # complex Gaussian spectrum: one draw of interleaved re/im parts, viewed as complex
        return self.rng.standard_normal(shape[:-1] + (2 * shape[-1],)).view(np.complex128)

    def add_noise(self, lo_hz, hi_hz, gain=1.0):
        """Add stationary band-limited Gaussian noise of RMS about ``gain``."""
        # Independent Gaussian noises add in power, so all stationary bands
        # share one random spectrum drawn in render(): one draw, not one per band.
        m = self._mask(lo_hz, hi_hz)
        m2 = m * m
        self.P += m2 * (gain * self.n / 2.0) ** 2 / (np.sum(m2) + 1e-24)  # np.sum, not np.dot: no BLAS threads

    def add_tones(self, freqs_hz, amps):
        """Add steady sinusoids (nearest FFT bin) with random phases."""
        k = np.clip(np.rint(np.asarray(freqs_hz) * self.n / self.sr).astype(int), 1, self.f.size - 1)
        ph = self.rng.uniform(0, 2 * np.pi, k.size)
        np.add.at(self.S, k, np.asarray(amps, dtype=float) * self.n / 2.0 * np.exp(1j * ph))

    def add_hum(self, f0_hz, amps):
        f0 = f0_hz * (1.0 + 0.002 * self.rng.standard_normal())
        self.add_tones(f0 * np.arange(1, len(amps) + 1), amps)

    def render(self):
        spec = self.S
        if self.P.any():
            spec = spec + self._cnoise((self.P.size,)) * np.sqrt(self.P)
        return np.fft.irfft(spec, self.n)

    def noise(self, lo_hz, hi_hz, k=1):
        """``k`` rows of unit-RMS Gaussian noise band-limited to [lo, hi] Hz."""
        m = self._mask(lo_hz, hi_hz)
        spec = self._cnoise((k, m.size))
        spec *= m
        x = np.fft.irfft(spec, self.n, axis=1)
        x /= x.std(axis=1, keepdims=True) + 1e-12
        return x if k > 1 else x[0]

    def slow(self, rate_hz, k=1):
        """Smooth random curves (zero mean, unit scale) varying at about ``rate_hz``."""
        m = max(int(self.n / self.sr * rate_hz) + 3, 3)
        knots = self.rng.standard_normal((k, m))
        # Interpolate on a grid 16 times coarser, then hold each value for 16
        # samples: at 1 ms steps an envelope is smooth to the ear and this is
        # far cheaper than interpolating every sample.
        hold = 16
        nl = -(-self.n // hold)
        grid = np.linspace(0, m - 1, nl)
        i0 = np.minimum(grid.astype(int), m - 2)
        frac = grid - i0
        low = knots[:, i0] * (1.0 - frac) + knots[:, i0 + 1] * frac
        out = np.repeat(low, hold, axis=1)[:, : self.n]
        return out if k > 1 else out[0]

    def train(self, rate_hz=None, times_s=None, amp_sd=0.3):
        """An impulse train: Poisson events at ``rate_hz`` or at given times."""
        x = np.zeros(self.n)
        if times_s is None:
            count = self.rng.poisson(rate_hz * self.n / self.sr)
            idx = self.rng.integers(0, self.n, count)
        else:
            idx = (np.asarray(times_s) * self.sr).astype(int)
            idx = idx[(idx >= 0) & (idx < self.n)]
        np.add.at(x, idx, np.abs(1.0 + amp_sd * self.rng.standard_normal(idx.size)))
        return x

    def place(self, train, template):
        """Every impulse of ``train`` replaced by ``template`` (sparse trains added directly)."""
        idx = np.flatnonzero(train)
        if idx.size > 24:
            return fftconvolve(train, template)[: self.n]
        out = np.zeros(self.n)
        for i in idx:
            seg = template[: self.n - i]
            out[i:i + seg.size] += train[i] * seg
        return out

    def decay_tone(self, freqs_hz, decay_s, length_s):
        tt = np.arange(int(length_s * self.sr)) / self.sr
        ph = self.rng.uniform(0, 2 * np.pi, len(freqs_hz))
        w = sum(np.sin(2 * np.pi * fr * tt + p) for fr, p in zip(freqs_hz, ph, strict=False))
        return w * np.exp(-tt / decay_s)

    def burst(self, lo_hz, hi_hz, decay_s, length_s):
        m = min(int(length_s * self.sr), self.n)
        tt = np.arange(m) / self.sr
        # a short segment of white noise, band-limited by a tiny FFT of its own
        seg = np.fft.irfft(np.fft.rfft(self.rng.standard_normal(m))
                           * _band(np.fft.rfftfreq(m, 1.0 / self.sr), lo_hz, min(hi_hz, 0.45 * self.sr)), m)
        seg /= seg.std() + 1e-12
        return seg * np.exp(-tt / decay_s)

    def babble(self, voices, level=1.0):
        """Crowd babble: band-passed noises, each gated at a syllable rate."""
        if voices <= 0:
            return np.zeros(self.n)
        lo = self.rng.uniform(150, 400)
        hi = self.rng.uniform(2200, 4000)
        v = self.noise(lo, hi, k=voices).reshape(voices, self.n)
        syll = np.maximum(self.slow(self.rng.uniform(3.0, 6.0), k=voices).reshape(voices, self.n), 0.0) ** 2
        phrase = np.maximum(self.slow(0.5, k=voices).reshape(voices, self.n) + 0.8, 0.0)
        return level * (v * syll * phrase).sum(axis=0) / np.sqrt(voices)


def _band(f, lo_hz, hi_hz):
    """Magnitude of a 4th-order-slope band pass (like a pair of 2nd-order Butterworths)."""
    f = np.maximum(f, 1e-3)
    a = lo_hz / f
    a *= a
    a *= a
    b = f / hi_hz
    b *= b
    b *= b
    a += 1.0
    b += 1.0
    a *= b
    return np.reciprocal(a, out=a)


def _quiet_room(c: _Ctx):
    r = c.rng
    c.add_hum(50.0, r.uniform(0.2, 1.0, 6) * np.array([1.0, 0.6, 0.5, 0.3, 0.2, 0.15]))
    c.add_noise(30, 4000, r.uniform(0.2, 0.6))
    x = c.render()
    if r.random() < 0.3:
        x += 4.0 * c.place(c.train(times_s=[r.uniform(0, 2.8)]), c.burst(40, 300, 0.05, 0.25))
    if r.random() < 0.2:
        x += 2.0 * c.place(c.train(times_s=np.arange(r.uniform(0, 1), 3.0, 1.0), amp_sd=0.05),
                           c.decay_tone([3100.0, 4700.0], 0.004, 0.02))
    return x


def _office(c: _Ctx):
    r = c.rng
    c.add_noise(50, 600, 1.0)
    c.add_hum(50.0, [0.3, 0.12, 0.06])
    if r.random() < 0.15:
        c.add_tones([r.uniform(600, 900)], [1.0])  # a phone ringing somewhere
    x = c.render()
    if r.random() < 0.75:
        click = c.burst(1500, 6000, 0.003, 0.012)
        x += r.uniform(1.5, 4.0) * c.place(c.train(rate_hz=r.uniform(3, 9)), click)
    if r.random() < 0.5:
        x += r.uniform(0.5, 1.5) * c.babble(1)
    return x


def _cafe(c: _Ctx):
    r = c.rng
    c.add_noise(60, 800, 0.3)
    x = c.render() + c.babble(int(r.integers(5, 10)))
    f1 = r.uniform(2500, 6000)
    clink = c.decay_tone([f1, f1 * r.uniform(1.4, 2.3), f1 * r.uniform(2.5, 3.1)], r.uniform(0.03, 0.08), 0.3)
    x += r.uniform(1.0, 3.0) * c.place(c.train(rate_hz=r.uniform(0.3, 1.5)), clink)
    if r.random() < 0.15:
        on = (c.t > r.uniform(0, 1.5)) & (c.t < r.uniform(1.8, 3.0))
        x += 1.5 * c.noise(2000, 7000) * on  # steam wand
    return x


def _supermarket(c: _Ctx):
    r = c.rng
    c.add_hum(100.0, r.uniform(0.3, 1.0, 5) * np.array([1.0, 0.7, 0.4, 0.3, 0.2]))
    c.add_noise(100, 1200, r.uniform(0.8, 1.5))
    x = c.render()
    fb = r.choice([2400.0, 2750.0, 3100.0])
    beep_len = r.uniform(0.08, 0.15)
    tt = np.arange(int(beep_len * c.sr)) / c.sr
    beep = np.sin(2 * np.pi * fb * tt) * np.minimum(1.0, np.minimum(tt, beep_len - tt) / 0.005)
    x += r.uniform(0.8, 2.0) * c.place(c.train(rate_hz=r.uniform(0.3, 1.2), amp_sd=0.05), beep)
    x += 0.6 * c.babble(int(r.integers(1, 4)))
    if r.random() < 0.3:
        x += 0.8 * c.noise(500, 3000) * (1 + np.sin(2 * np.pi * 20 * c.t))  # trolley rattle
    return x


def _sports_music(c: _Ctx):
    r = c.rng
    period = 60.0 / r.uniform(110, 135)
    beats = np.arange(r.uniform(0, period), c.n / c.sr, period)
    root = r.uniform(200, 330)
    c.add_tones(root * np.array([1.0, 1.26, 1.5]), [0.25, 0.25, 0.25])
    c.add_noise(200, 2000, 0.3)
    x = c.render()
    kl = int(0.2 * c.sr)
    tt = np.arange(kl) / c.sr
    kick = np.sin(2 * np.pi * (45 * tt + 1.2 * (1 - np.exp(-tt / 0.03)))) * np.exp(-tt / 0.08)
    x += 3.0 * c.place(c.train(times_s=beats, amp_sd=0.05), kick)
    hat = c.burst(6000, 10000, 0.01, 0.04)
    x += r.uniform(0.5, 1.2) * c.place(c.train(times_s=beats + period / 2, amp_sd=0.1), hat)
    gate = np.mod(c.t - beats[0], period) < 0.6 * period
    x += 0.8 * np.sin(2 * np.pi * r.uniform(50, 80) * c.t) * gate
    x += 0.5 * c.babble(int(r.integers(2, 6)))
    if r.random() < 0.2:
        on = (c.t > r.uniform(0, 2)) & (c.t % 1 < 0.4)
        x += 1.2 * np.sin(2 * np.pi * (3000 * c.t + 15 * np.sin(2 * np.pi * 30 * c.t))) * on  # whistle
    return x


def _gull(c: _Ctx):
    r = c.rng
    length = r.uniform(0.25, 0.5)
    tt = np.arange(int(length * c.sr)) / c.sr
    f_start, f_end = r.uniform(1500, 2200), r.uniform(900, 1300)
    f = f_start + (f_end - f_start) * (tt / length) ** 0.7
    ph = 2 * np.pi * np.cumsum(f) / c.sr
    env = np.sin(np.pi * tt / length) ** 2
    return env * (np.sin(ph) + 0.5 * np.sin(2 * ph) + 0.25 * np.sin(3 * ph))


def _wind_gulls(c: _Ctx):
    r = c.rng
    gust = np.exp(0.6 * c.slow(r.uniform(0.3, 0.8)))
    c.add_noise(20, r.uniform(250, 450), 1.0)
    c.add_noise(300, 1500, 0.3)
    x = gust * c.render()
    if r.random() < 0.6:
        x += 0.7 * c.noise(100, 2000) * (1.2 + np.sin(2 * np.pi * r.uniform(0.1, 0.25) * c.t + r.uniform(0, 6)))
    for _ in range(r.poisson(1.3)):
        g = _gull(c)
        at = int(r.integers(0, max(c.n - g.size, 1)))
        x[at:at + g.size] += r.uniform(1.0, 3.0) * g[: c.n - at]
    return x


def _vehicle(c: _Ctx):
    r = c.rng
    f0 = r.uniform(25, 60)
    amps = r.uniform(0.5, 1.0, 8) / np.arange(1, 9)
    # a slightly unsteady engine: each harmonic smeared over a few neighbouring bins
    for spread in (-0.004, 0.0, 0.004):
        c.add_tones(f0 * (1 + spread) * np.arange(1, 9), amps / 3.0)
    c.add_noise(30, 1000, r.uniform(0.8, 1.6))
    x = c.render()
    if r.random() < 0.2:
        x += 1.5 * c.place(c.train(times_s=np.arange(r.uniform(0, 0.7), 3.0, 0.7), amp_sd=0.02),
                           c.decay_tone([1800.0, 2600.0], 0.005, 0.03))  # indicator
    return x


def _street(c: _Ctx):
    r = c.rng
    passing = np.exp(-((c.t - r.uniform(-1, 4)) / r.uniform(0.6, 1.5)) ** 2)
    x = (0.5 + 1.5 * passing) * c.noise(60, 1200) + 0.4 * c.noise(20, 300) * np.exp(0.5 * c.slow(0.5))
    if r.random() < 0.05:
        c.add_hum(r.uniform(380, 450), [1.0, 0.6, 0.3])  # a horn
        on = (c.t > r.uniform(0, 2.5)) & (c.t % 1 < 0.3)
        x += 1.5 * c.render() * on
    if r.random() < 0.3:
        x += 0.8 * c.babble(1)
    return x


_RECIPES = {
    "quiet_room": _quiet_room,
    "office": _office,
    "cafe": _cafe,
    "supermarket": _supermarket,
    "sports_music": _sports_music,
    "wind_gulls": _wind_gulls,
    "vehicle": _vehicle,
    "street": _street,
}
assert set(_RECIPES) == set(SOUND_TYPES)
