"""On-device features: audio snippets and accelerometry bursts.

Audio (one short-time Fourier transform, everything derived from it)
    MFCC 1–20 mean and SD, an 8-band summary of a 40-band log-mel spectrogram,
    spectral centroid, flatness and roll-off, zero-crossing rate, and two
    levels: RMS in dBFS (AES17: a full-scale sine reads 0 dBFS) and an
    A-weighted level in dB(A) re full scale (IEC 61672-1 weighting, applied in
    the frequency domain).
Accelerometry (per ``intake.accel_window_seconds`` window)
    ENMO (van Hees et al. 2013), SD of the vector magnitude, dominant frequency
    of the magnitude by Welch's method, and an active flag.

The vector order is :data:`AUDIO_FEATURE_NAMES`; units and sources are in
``docs/features.md``.  The decoded signal is discarded once these are computed.
"""

from __future__ import annotations

import threading
import time
from functools import lru_cache

import numpy as np

from .item import ItemResult

N_MFCC = 20
N_MELS = 40
N_MEL_BANDS = 8
ROLL_PERCENT = 0.85
# Analysis frame of 32 ms and hop of 16 ms at any sample rate.
FRAME_S = 0.032
HOP_S = 0.016

AUDIO_FEATURE_NAMES: tuple[str, ...] = (
    tuple(f"mfcc{i}_mean" for i in range(1, N_MFCC + 1))
    + tuple(f"mfcc{i}_sd" for i in range(1, N_MFCC + 1))
    + tuple(f"logmel_band{i}_db" for i in range(1, N_MEL_BANDS + 1))
    + ("centroid_hz", "flatness", "rolloff_hz", "zcr")
)

# IEC 61672-1 (clause 5.4.11 and Annex E, from memory): pole frequencies of the
# A-weighting network in Hz, rounded as the standard quotes them,
# and the +2.00 dB normalisation that makes A(1 kHz) = 0 dB.
A_F1, A_F2, A_F3, A_F4 = 20.6, 107.7, 737.9, 12194.0
A_1000_DB = 2.00

# A window is active when its mean ENMO reaches the sedentary/light boundary of
# 44.8 mg for the non-dominant wrist in adults (Hildebrand et al. 2017, Scand J
# Med Sci Sports 27(12):1814-1823, as quoted in agent/codebook.py), so the
# active flag and the codebook's "sedentary" band agree.
ACTIVE_ENMO_G = 0.0448
# Welch segment of 5 s with 50 % overlap: 0.2 Hz resolution, three segments in
# a 10 s window.
WELCH_SEGMENT_S = 5.0
# A window whose magnitude varies less than this (g, SD) has no dominant frequency.
STILL_SD_G = 1e-3


# ---------------------------------------------------------------------------
# A-weighting and levels
# ---------------------------------------------------------------------------
def a_weighting_db(f_hz) -> np.ndarray:
    """IEC 61672-1 A-weighting in dB at frequencies ``f_hz`` (−inf at 0 Hz)."""
    f = np.asarray(f_hz, dtype=float)
    f2 = f * f
    with np.errstate(divide="ignore"):
        ra = (A_F4**2 * f2**2) / (
            (f2 + A_F1**2) * np.sqrt((f2 + A_F2**2) * (f2 + A_F3**2)) * (f2 + A_F4**2)
        )
        return 20.0 * np.log10(ra) + A_1000_DB


@lru_cache(maxsize=16)
def _a_weight_power(n: int, sr: int) -> np.ndarray:
    """Linear power weights |A(f)|² on the ``rfft`` grid of length ``n``.

    Doubled for the bins that stand for two of a real signal's spectrum (every
    bin but DC and, for even ``n``, Nyquist), so a plain dot product with the
    one-sided power spectrum gives the weighted power.
    """
    f = np.fft.rfftfreq(n, 1.0 / sr)
    w = np.zeros_like(f)
    w[1:] = 10.0 ** (a_weighting_db(f[1:]) / 10.0)
    w[1:(n + 1) // 2] *= 2.0
    w.flags.writeable = False
    return w


def level_dbfs(y: np.ndarray) -> float:
    """RMS level in dBFS, AES17 convention: ``20 log10(rms * sqrt(2))``."""
    rms = float(np.sqrt(np.mean(np.square(y, dtype=np.float64))))
    return 20.0 * float(np.log10(max(rms * np.sqrt(2.0), 1e-10)))


def level_dba(y: np.ndarray, sr: int) -> float:
    """A-weighted RMS level in dB(A) re full scale (same AES17 reference).

    The weighting is applied to the power spectrum of the whole snippet; by
    Parseval's theorem the weighted power sum is the mean square of the
    A-filtered signal (zero-phase, circular).  The snippet's own spectrum, not
    the 32 ms frames of the spectrogram: a frame's bins are ``sr / n_fft``
    (31 Hz) wide, and the window's leakage across bins where the weighting is
    steep reads a 100 Hz tone 0.4 dB and a 50 Hz tone 2.4 dB too loud
    (measured; ``docs/features.md``).  One single-precision transform.
    """
    import scipy.fft

    y = np.asarray(y, dtype=np.float32)
    n = len(y)
    p = np.abs(scipy.fft.rfft(y))
    p *= p
    # An elementwise product and a sum rather than np.dot: no multi-threaded BLAS call.
    ms = float(np.sum(p * _a_weight_power(n, sr))) / (n * n)
    return 10.0 * float(np.log10(max(2.0 * ms, 1e-20)))


# ---------------------------------------------------------------------------
# Audio
# ---------------------------------------------------------------------------
def frame_params(sr: int) -> tuple[int, int]:
    """``(n_fft, hop_length)`` for ``sr``: a power of two near 32 ms, half-overlapping."""
    n_fft = 1 << int(round(np.log2(FRAME_S * sr)))
    return n_fft, n_fft // 2


def hz_to_mel(f_hz):
    """Slaney's mel scale (the Auditory Toolbox; librosa's default, ``htk=False``).

    Linear below 1 kHz (3 mels per 200 Hz), logarithmic above (27 mels per
    factor of 6.4), so that 1 kHz is 15 mels.
    """
    f = np.asarray(f_hz, dtype=np.float64)
    lin = f / (200.0 / 3.0)
    logstep = np.log(6.4) / 27.0
    with np.errstate(divide="ignore"):
        log = 15.0 + np.log(np.maximum(f, 1e-300) / 1000.0) / logstep
    return np.where(f >= 1000.0, log, lin)


def mel_to_hz(mels):
    """Inverse of :func:`hz_to_mel`."""
    m = np.asarray(mels, dtype=np.float64)
    logstep = np.log(6.4) / 27.0
    return np.where(m >= 15.0, 1000.0 * np.exp(logstep * (m - 15.0)), m * (200.0 / 3.0))


def mel_filterbank(sr: int, n_fft: int, n_mels: int = N_MELS) -> np.ndarray:
    """Triangular mel filters on the ``rfft`` grid, Slaney area normalisation.

    The same matrix as ``librosa.filters.mel(sr=sr, n_fft=n_fft, n_mels=n_mels)``
    (tested against it), built here so intake never imports librosa's signal
    stack and numba at start-up.
    """
    fft_f = np.fft.rfftfreq(n_fft, 1.0 / sr)
    mel_f = mel_to_hz(np.linspace(hz_to_mel(0.0), hz_to_mel(sr / 2.0), n_mels + 2))
    fdiff = np.diff(mel_f)
    ramps = mel_f[:, None] - fft_f[None, :]
    lower = -ramps[:-2] / fdiff[:-1, None]
    upper = ramps[2:] / fdiff[1:, None]
    w = np.maximum(0.0, np.minimum(lower, upper))
    w *= (2.0 / (mel_f[2:] - mel_f[:-2]))[:, None]
    return w.astype(np.float32)


@lru_cache(maxsize=8)
def _mel_basis(sr: int, n_fft: int):
    """The mel filterbank as a sparse matrix.

    Each FFT bin feeds at most two triangular filters, so a sparse product is
    ~20x less arithmetic than a dense one, and it avoids waking a multi-threaded
    BLAS for a small product: on a busy 2-core laptop that wake-up cost more
    than the product itself (measured, see docs/features.md).
    """
    import scipy.sparse

    return scipy.sparse.csr_matrix(mel_filterbank(sr, n_fft))


def _mfcc(log_mel: np.ndarray) -> np.ndarray:
    """The first :data:`N_MFCC` coefficients of the orthonormal DCT-II over the mel axis.

    As librosa.feature.mfcc computes them; scipy's transform rather than a
    matrix product, because products of this size wake a multi-threaded BLAS
    whose threads cost more than the arithmetic on a busy 2-core machine
    (measured; ``docs/features.md``).  The other products in this module are
    elementwise for the same reason.
    """
    import scipy.fft

    return scipy.fft.dct(log_mel, type=2, norm="ortho", axis=0)[:N_MFCC]


_WORK = threading.local()


def _scratch(name: str, shape: tuple[int, ...], dtype) -> np.ndarray:
    """A work array of this thread, kept between calls while its shape and type stay the same.

    Arrays of a few hundred KB are mapped afresh by the allocator on every call,
    and touching new pages cost about as much as the arithmetic on them: the
    spectrogram took 0.32 ms per 3 s snippet with fresh arrays and 0.17 ms with
    these (measured, ``docs/features.md``).  Per thread, so concurrent callers
    never share one; whatever is returned from one is consumed before the next
    call.
    """
    arrays = getattr(_WORK, "arrays", None)
    if arrays is None:
        arrays = _WORK.arrays = {}
    arr = arrays.get(name)
    if arr is None or arr.shape != shape or arr.dtype != np.dtype(dtype):
        arr = arrays[name] = np.empty(shape, dtype=dtype)
    return arr


def _wipe_scratch() -> None:
    """Zero this thread's work arrays once a snippet's features exist.

    They held the padded signal, its frames and its spectra; nothing of a
    snippet is kept after its features (``docs/features.md``, "Discarded").
    Writing zeros into pages already mapped is cheap; mapping new ones was not.
    """
    for arr in getattr(_WORK, "arrays", {}).values():
        arr.fill(0)   # 0.7 MB for a 3 s 16 kHz snippet


def _stft_frames(y: np.ndarray, n_fft: int, hop_length: int, *, scratch: bool = False) -> np.ndarray:
    """Magnitude spectrogram as ``(frames, 1 + n_fft // 2)`` float32 (frames in rows).

    With ``scratch`` the result (and the framing) live in this thread's work
    arrays (:func:`_scratch`): valid until the next call with ``scratch``.
    """
    from numpy.lib.stride_tricks import as_strided

    import scipy.fft

    pad = n_fft // 2
    n = len(y) + 2 * pad
    if scratch:
        yp = _scratch("stft_padded", (n,), np.float32)
        yp[:pad] = 0.0
        yp[pad + len(y):] = 0.0
    else:
        yp = np.zeros(n, dtype=np.float32)
    yp[pad:pad + len(y)] = y
    n_frames = 1 + (len(yp) - n_fft) // hop_length
    frames = as_strided(yp, shape=(n_frames, n_fft), strides=(hop_length * 4, 4), writeable=False)
    windowed = np.multiply(frames, _hann(n_fft),
                           out=_scratch("stft_windowed", (n_frames, n_fft), np.float32) if scratch else None)
    # scipy's float32 transform (complex64 out) is about twice numpy's speed here.
    spec = scipy.fft.rfft(windowed, axis=-1, overwrite_x=scratch)
    return np.abs(spec, out=_scratch("stft_magnitude", spec.shape, np.float32) if scratch else None)


def stft_magnitude(y: np.ndarray, n_fft: int, hop_length: int) -> np.ndarray:
    """Magnitude STFT, ``(1 + n_fft // 2, frames)``, as ``librosa.stft`` computes it.

    Periodic Hann window, frames centred by zero-padding ``n_fft // 2`` on each
    side (librosa's default ``pad_mode="constant"``).  Written in numpy so the
    hot path needs no numba compilation.
    """
    return _stft_frames(np.asarray(y, dtype=np.float32), n_fft, hop_length).T


@lru_cache(maxsize=8)
def _hann(n: int) -> np.ndarray:
    # Periodic ("fftbins") Hann, as scipy.signal.get_window("hann", n) gives.
    return (0.5 - 0.5 * np.cos(2.0 * np.pi * np.arange(n) / n)).astype(np.float32)


def _signs(y: np.ndarray) -> np.ndarray:
    """Sign bits, with samples within 1e-10 of zero read as positive zero (librosa's threshold)."""
    y = np.asarray(y, dtype=np.float32)
    return np.signbit(y) & (np.abs(y) > 1e-10)


def zero_crossing_rate(y: np.ndarray, frame_length: int, hop_length: int) -> np.ndarray:
    """Zero crossings per sample in each frame, as ``librosa.feature.zero_crossing_rate``.

    Frames are centred with edge padding; samples within 1e-10 of zero count
    as positive zero; a crossing is a change of sign bit between neighbours.
    """
    pad = frame_length // 2
    s = _signs(np.pad(np.asarray(y, dtype=np.float32), (pad, pad), mode="edge"))
    change = (s[1:] != s[:-1]).astype(np.int32)
    # change[i] compares x[i] and x[i+1]; a frame starting at j holds j..j+L-1.
    csum = np.concatenate([[0], np.cumsum(change)])
    starts = np.arange(0, len(s) - frame_length + 1, hop_length)
    counts = csum[starts + frame_length - 1] - csum[starts]
    return counts / frame_length


@lru_cache(maxsize=8)
def _zcr_weights(n: int, frame_length: int, hop_length: int) -> tuple[np.ndarray, np.ndarray, int]:
    """Where a neighbour pair of an ``n``-sample signal counts other than twice, and the frame count.

    In :func:`zero_crossing_rate`'s padded signal the pair ``(i, i + 1)`` is in
    frame ``j`` when ``j hop <= i <= j hop + frame_length - 2``; the edge padding
    repeats the end samples, so pairs in the padding never cross.  With frames
    overlapping by half, most pairs are in two frames; returns the pairs in one
    frame and the pairs in none (by index into the signal's ``n - 1`` pairs).
    """
    pad = frame_length // 2
    n_frames = (n + 2 * pad - frame_length) // hop_length + 1
    i = np.arange(pad, pad + n - 1)
    j_max = np.minimum(i // hop_length, n_frames - 1)
    j_min = np.maximum(-((frame_length - 2 - i) // hop_length), 0)
    w = np.maximum(j_max - j_min + 1, 0)
    if w.max(initial=0) > 2:
        raise ValueError(f"frames overlap by more than half (frame_length={frame_length}, hop={hop_length})")
    once, never = np.flatnonzero(w == 1), np.flatnonzero(w == 0)
    once.flags.writeable = never.flags.writeable = False
    return once, never, n_frames


def zero_crossing_rate_mean(y: np.ndarray, frame_length: int, hop_length: int) -> float:
    """``zero_crossing_rate(y, frame_length, hop_length).mean()`` in one pass, without framing.

    Each crossing is counted once, times the number of frames that hold it
    (:func:`_zcr_weights`); integer counts, so the result equals the framed
    mean.  Requires ``hop_length >= frame_length / 2``, as :func:`frame_params` gives.
    """
    s = _signs(y)
    once, never, n_frames = _zcr_weights(len(s), frame_length, hop_length)
    change = s[1:] != s[:-1]
    crossings = (2 * np.count_nonzero(change) - np.count_nonzero(change[once])
                 - 2 * np.count_nonzero(change[never]))
    return crossings / (frame_length * n_frames)


def audio_vector(y: np.ndarray, sr: int) -> np.ndarray:
    """The feature vector of a mono signal, in :data:`AUDIO_FEATURE_NAMES` order.

    One magnitude spectrogram serves every spectral feature (frames in rows, so
    the per-frame sums run along contiguous memory); the zero-crossing rate is
    one pass over the samples with the spectrogram's framing.
    """
    y = np.asarray(y, dtype=np.float32)
    n_fft, hop = frame_params(sr)
    mag = _stft_frames(y, n_fft, hop, scratch=True)          # (frames, bins), float32
    # One more work array, for the power and then, in turn, the products below.
    power = np.multiply(mag, mag, out=_scratch("power", mag.shape, np.float32))
    freqs = np.fft.rfftfreq(n_fft, 1.0 / sr)

    mel = _mel_basis(sr, n_fft) @ power.T      # (mels, frames)
    # power_to_db(ref=1, amin=1e-10, top_db=80), as librosa.feature.mfcc does.
    log_mel = 10.0 * np.log10(np.maximum(mel.astype(np.float64), 1e-10))
    log_mel = np.maximum(log_mel, log_mel.max() - 80.0)
    mfcc = _mfcc(log_mel)
    bands = log_mel.reshape(N_MEL_BANDS, -1).mean(axis=1)

    # Flatness on the power spectrum with amin = 1e-10 (librosa's definition).
    pw = np.maximum(power, np.float32(1e-10), out=power)   # the power is not needed after this
    arith = pw.mean(axis=1, dtype=np.float64)
    flatness = np.exp(np.log(pw, out=pw).mean(axis=1, dtype=np.float64)) / arith
    mag_sum = mag.sum(axis=1, dtype=np.float64)
    centroid = (np.multiply(mag, freqs.astype(np.float32), out=power).sum(axis=1, dtype=np.float64)
                / np.maximum(mag_sum, 1e-10))
    cum = np.cumsum(mag, axis=1, out=power)   # single precision, as librosa's spectral_rolloff sums
    idx = np.argmax(cum >= ROLL_PERCENT * cum[:, -1:], axis=1)
    rolloff = freqs[idx]
    zcr = zero_crossing_rate_mean(y, n_fft, hop)

    vec = np.concatenate([
        mfcc.mean(axis=1), mfcc.std(axis=1), bands,
        [centroid.mean(), flatness.mean(), rolloff.mean(), zcr],
    ])
    _wipe_scratch()
    return vec


def audio_features(clip, policy) -> ItemResult:
    """ItemResult with one ``audio_features`` row for a validated clip."""
    vec = audio_vector(clip.y, clip.sr)
    payload = {
        "t": float(clip.t),
        "vec": [float(v) for v in vec],
        "dbfs": level_dbfs(clip.y),
        "dba": level_dba(clip.y, clip.sr),
    }
    dur = len(clip.y) / clip.sr
    return ItemResult(kind="audio", rows={"audio_features": [("", payload)]},
                      warnings=list(clip.warnings), n_samples=int(clip.n_frames),
                      t_start=float(clip.t), t_end=float(clip.t) + dur)


# ---------------------------------------------------------------------------
# Accelerometry
# ---------------------------------------------------------------------------
def enmo_g(xyz_g: np.ndarray) -> np.ndarray:
    """Euclidean norm minus one g, negatives set to zero (van Hees et al. 2013)."""
    mag = np.sqrt(np.einsum("ij,ij->i", xyz_g, xyz_g))
    return np.maximum(mag - 1.0, 0.0)


@lru_cache(maxsize=16)
def _welch_window(nperseg: int) -> tuple[np.ndarray, float]:
    """Periodic Hann window of ``nperseg`` samples and the sum of its squares."""
    win = 0.5 - 0.5 * np.cos(2.0 * np.pi * np.arange(nperseg) / nperseg)
    win.flags.writeable = False
    return win, float(np.sum(win * win))


def welch_psd(x: np.ndarray, fs: float, nperseg: int) -> tuple[np.ndarray, np.ndarray]:
    """Welch's PSD estimate along the last axis, as ``scipy.signal.welch`` computes it.

    Periodic Hann window, 50 % overlap, constant detrend, one-sided density
    scaling, mean over segments; written in numpy because scipy's general
    machinery costs more than the transform for windows of a hundred samples.
    """
    x = np.ascontiguousarray(x, dtype=np.float64)
    step = nperseg - nperseg // 2
    n = x.shape[-1]
    n_seg = (n - nperseg) // step + 1
    # Overlapping segments as a read-only view of x: (..., n_seg, nperseg).
    seg = np.ndarray(shape=x.shape[:-1] + (n_seg, nperseg), dtype=x.dtype, buffer=x,
                     strides=x.strides[:-1] + (step * x.strides[-1], x.strides[-1]))
    win, win_ss = _welch_window(nperseg)
    seg = (seg - seg.sum(axis=-1, keepdims=True) / nperseg) * win
    spec = np.abs(np.fft.rfft(seg, axis=-1))
    spec *= spec
    spec /= fs * win_ss
    if nperseg % 2:
        spec[..., 1:] *= 2.0
    else:
        spec[..., 1:-1] *= 2.0
    return _rfft_hz(nperseg, float(fs)), spec.sum(axis=-2) / n_seg


@lru_cache(maxsize=16)
def _rfft_hz(n: int, fs: float) -> np.ndarray:
    f = np.fft.rfftfreq(n, 1.0 / fs)
    f.flags.writeable = False
    return f


def dominant_hz(mag: np.ndarray, rate_hz: float, sd_g: np.ndarray | None = None) -> np.ndarray:
    """Dominant frequency of each row of ``mag`` (windows x samples) by Welch.

    The frequency of the largest :func:`welch_psd` value, DC excluded; a window
    whose magnitude SD is below :data:`STILL_SD_G` has no dominant frequency
    and gets 0.  ``sd_g`` is each row's SD if the caller has it.
    """
    mag = np.atleast_2d(np.asarray(mag, dtype=np.float64))
    n = mag.shape[-1]
    nperseg = min(n, max(4, int(round(WELCH_SEGMENT_S * rate_hz))))
    f = _rfft_hz(nperseg, float(rate_hz))
    dom = np.zeros(mag.shape[0])
    if len(f) > 1:
        dom = f[1:][np.argmax(_welch_unscaled(mag, nperseg)[:, 1:], axis=-1)]
    still = (mag.std(axis=-1) if sd_g is None else sd_g) < STILL_SD_G
    return np.where(still, 0.0, dom)


def _welch_unscaled(x: np.ndarray, nperseg: int) -> np.ndarray:
    """:func:`welch_psd` of the rows of ``x`` times a positive constant (enough for its argmax).

    The density scale ``2 / (fs · Σ w²)`` and the mean over segments are one
    factor common to every bin except DC and (for even ``nperseg``) Nyquist,
    which carry half of it; so the Nyquist bin is halved here and the rest left
    as summed periodograms (tested against :func:`welch_psd`).
    """
    x = np.ascontiguousarray(x)
    step = nperseg - nperseg // 2
    n_seg = (x.shape[-1] - nperseg) // step + 1
    seg = np.ndarray(shape=x.shape[:-1] + (n_seg, nperseg), dtype=x.dtype, buffer=x,
                     strides=x.strides[:-1] + (step * x.strides[-1], x.strides[-1]))
    seg = seg - seg.mean(axis=-1, keepdims=True)
    seg *= _welch_window(nperseg)[0]
    spec = np.abs(np.fft.rfft(seg, axis=-1))
    spec *= spec
    if nperseg % 2 == 0:
        spec[..., -1] *= 0.5
    return spec.sum(axis=-2)


def accel_windows(t: np.ndarray, xyz_g: np.ndarray, rate_hz: float, window_s: float,
                  mag_g: np.ndarray | None = None):
    """Per-window features; returns ``(rows, n_skipped)``.

    Windows start at ``t[0] + k * window_s``: sample ``i`` is in window
    ``floor((t[i] - t[0]) / window_s)``.  A window holding fewer than half the
    samples the rate implies (the ragged end of a burst, or a gap) is skipped
    and counted.  ``mag_g`` is the vector magnitude if the caller has it.

    ``t`` is strictly increasing (the readers check it), so each window is a
    contiguous run of samples.  The usual burst, every window full and of one
    length, is a reshape (its bounds found by one binary search); otherwise the
    runs are found where the window number changes, so the work is linear in
    the samples however long a gap is.
    """
    mag = np.sqrt(np.einsum("ij,ij->i", xyz_g, xyz_g)) if mag_g is None else np.asarray(mag_g, dtype=np.float64)
    n = mag.shape[0]
    u = (t - t[0]) / window_s
    n_win = int(u[-1]) + 1
    half = 0.5 * rate_hz * window_s
    if n_win <= n:
        # edges[j]: the first sample with u >= j, i.e. with floor(u) >= j (j is a whole number).
        edges = np.searchsorted(u, np.arange(n_win + 1, dtype=np.float64))
        length = int(edges[1])
        if length >= half and length * n_win == n and (edges[1:] - edges[:-1] == length).all():
            # The usual burst: every window full and back to back from the first sample.
            block = mag.reshape(n_win, length)
            mag_mean = block.sum(axis=1) / length
            enmo_mean = np.maximum(block - 1.0, 0.0).sum(axis=1) / length
            sd = np.sqrt(np.maximum(np.einsum("ij,ij->i", block, block) / length - mag_mean * mag_mean, 0.0))
            dom = dominant_hz(block, rate_hz, sd_g=sd)
            return _window_rows(t[0] + np.arange(n_win) * window_s, enmo_mean, sd, dom), 0
    # Runs of samples in one window: where the window number changes.
    k = np.floor(u).astype(np.int64)
    starts = np.concatenate([[0], np.flatnonzero(k[1:] != k[:-1]) + 1])
    counts = np.diff(np.append(starts, n))
    keep = np.flatnonzero(counts >= half)
    n_kept = counts[keep]   # at least one sample each: no division by zero below
    enmo_mean = np.add.reduceat(np.maximum(mag - 1.0, 0.0), starts)[keep] / n_kept
    mag_mean = np.add.reduceat(mag, starts)[keep] / n_kept
    sd = np.sqrt(np.maximum(np.add.reduceat(mag * mag, starts)[keep] / n_kept - mag_mean**2, 0.0))
    dom = np.zeros(keep.size)
    # Batch the windows of equal length through one Welch call each.
    by_len: dict[int, list[int]] = {}
    for i, c in enumerate(n_kept.tolist()):
        by_len.setdefault(c, []).append(i)
    for c, idx in by_len.items():
        block = np.stack([mag[starts[keep[i]]:starts[keep[i]] + c] for i in idx])
        dom[idx] = dominant_hz(block, rate_hz, sd_g=sd[idx])
    return _window_rows(t[0] + k[starts[keep]] * window_s, enmo_mean, sd, dom), int(n_win - keep.size)


def _window_rows(t_start, enmo_mean, sd, dom) -> list[list]:
    """Rows ``[t, enmo_g, sd_g, dom_hz, active]`` (floats, and the flag as 0 or 1)."""
    table = np.column_stack([t_start, enmo_mean, sd, dom]).tolist()
    active = (enmo_mean >= ACTIVE_ENMO_G).tolist()
    return [r + [int(a)] for r, a in zip(table, active, strict=True)]


def accel_features(rec, policy) -> ItemResult:
    """ItemResult with one ``accel_features`` row for a validated burst."""
    window_s = float(policy.intake.accel_window_seconds)
    rows, skipped = accel_windows(rec.t, rec.xyz_g, rec.rate_hz, window_s,
                                  mag_g=getattr(rec, "mag_g", None))
    warnings = list(rec.warnings)
    dropped = dict(rec.dropped)
    if skipped:
        dropped["short_window"] = skipped
        warnings.append(f"{skipped} window(s) with under half the expected samples skipped")
    if not rows:
        from .readers._common import reject

        reject(rec.path, "too_short",
               f"no {window_s:g} s window (intake.accel_window_seconds) holds half its samples")
    active = [r[4] for r in rows]
    payload = {
        "t0": float(rec.t[0]),
        "window_s": window_s,
        "windows": rows,
        "active_fraction": sum(active) / len(active),
    }
    return ItemResult(kind="accel", rows={"accel_features": [("", payload)]},
                      warnings=warnings, n_samples=int(len(rec.t)), dropped=dropped,
                      t_start=float(rec.t[0]), t_end=float(rec.t[-1]))


# ---------------------------------------------------------------------------
def warm_up(policy=None) -> float:
    """Run every feature once on synthetic inputs; returns the seconds taken.

    Imports the feature stack (scipy.fft, scipy.sparse, soundfile, soxr) and
    fills the small caches (mel filterbank, Hann window, A-weighting grid for
    the policy's snippet length), so the first real file is not slower than
    the rest.  The hot path uses none of librosa's numba functions, so there
    is nothing to compile; ``NUMBA_CACHE_DIR`` still matters if other code
    calls librosa.
    """
    t0 = time.perf_counter()
    sr = int(policy.intake.audio_sr) if policy is not None else 16000
    seconds = float(policy.schedule.audio_snippet_seconds) if policy is not None else 3.0
    rng = np.random.default_rng(0)
    # A snippet of the policy's length, so the A-weighting grid cached here is
    # the one real snippets use.
    y = (0.1 * rng.standard_normal(int(round(seconds * sr)))).astype(np.float32)
    audio_vector(y, sr)
    level_dbfs(y)
    level_dba(y, sr)
    from .readers.audio import resample

    resample(y[: sr // 2], sr, sr // 2 if sr > 8000 else 16000)
    tt = np.arange(200) / 10.0
    xyz = np.column_stack([np.zeros(200), np.zeros(200), 1.0 + 0.1 * np.sin(2 * np.pi * tt)])
    accel_windows(tt, xyz, 10.0, 10.0)
    return time.perf_counter() - t0
