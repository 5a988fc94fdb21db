"""Audio snippets: WAV, FLAC or Ogg Vorbis from bytes, to mono at ``intake.audio_sr``.

Validation, in order (first failure wins):

1. the bytes start with a RIFF/WAVE, RF64, ``fLaC`` or ``OggS`` header, so no
   other libsndfile parser ever sees them (else ``not_audio``);
2. the frames present are the frames the header claims, checked on the RIFF
   ``data`` chunk of a WAV and the STREAMINFO total of a FLAC, and the decoder
   reads to the end without error (else ``truncated``);
3. the duration is ``schedule.audio_snippet_seconds`` within
   ``intake.audio_length_tolerance_seconds`` (else ``wrong_length``);
4. every sample is finite and the signal is not constant, which is what an
   all-zero buffer or a stuck converter produces (else ``silent_corrupt``);
5. the file name carries a plausible start time (else ``bad_timestamp``).
"""

from __future__ import annotations

import io
import math
import struct
from dataclasses import dataclass, field

import numpy as np

from ._common import now_or, plausible_time, reject, stamp_from_name

# soxr's high-quality filter: librosa's res_type="soxr_hq" (the reference in the tests).
RES_TYPE = "soxr_hq"

# Half a 16-bit LSB: a peak-to-peak swing below this is no signal at all.
CONSTANT_PTP = 2.0 ** -16

# More than 1 % of samples at full scale: the level features are unreliable.
CLIP_LEVEL = 0.999
CLIP_FRACTION = 0.01

# Recorders in this study sample speech-band audio or better; a header outside
# these bounds is corrupt or not a recording.
MIN_SR, MAX_SR = 8000, 384000
MAX_CHANNELS = 8

_MAGIC = {b"RIFF": "wav", b"RF64": "wav", b"fLaC": "flac", b"OggS": "ogg"}


@dataclass
class AudioClip:
    """A decoded, validated snippet."""

    y: np.ndarray          # float32 mono at ``sr``
    sr: int
    t: float               # recording start, Unix seconds (UTC)
    orig_sr: int
    channels: int
    n_frames: int          # frames decoded at ``orig_sr``
    warnings: list[str] = field(default_factory=list)


def read_audio(path, data: bytes, policy, *, now: float | None = None) -> AudioClip:
    """Decode and validate one snippet; see the module docstring for the checks."""
    import soundfile as sf

    now = now_or(now)
    container = _MAGIC.get(data[:4])
    if container is None or (container == "wav" and data[8:12] != b"WAVE"):
        # Only the three contracted containers reach libsndfile: its other
        # format parsers are attack surface this study does not need.
        reject(path, "not_audio", "not a WAV, FLAC or Ogg file (no RIFF/WAVE, fLaC or OggS header)")
    claimed = None
    if container == "wav" and data[:4] == b"RIFF":
        claimed = _wav_claimed_frames(path, data)
    elif container == "flac":
        claimed = _flac_claimed_frames(data)

    target = float(policy.schedule.audio_snippet_seconds)
    tol = float(policy.intake.audio_length_tolerance_seconds)
    try:
        with sf.SoundFile(io.BytesIO(data)) as f:
            orig_sr = int(f.samplerate)
            channels = int(f.channels)
            if not MIN_SR <= orig_sr <= MAX_SR or not 1 <= channels <= MAX_CHANNELS:
                reject(path, "bad_header",
                       f"sample rate must be {MIN_SR}-{MAX_SR} Hz and channels 1-{MAX_CHANNELS}")
            # Read at most a little more than the longest allowed snippet, so a
            # small compressed file cannot expand into gigabytes.
            limit = int(np.ceil((target + tol) * orig_sr)) + 1
            y = f.read(frames=limit, dtype="float32", always_2d=True)
            header_frames = int(f.frames) if f.frames > 0 else None
    except (sf.SoundFileError, RuntimeError, ValueError, TypeError, EOFError, struct.error) as e:
        reject(path, "truncated", f"the {container.upper()} decoder failed: {_short(e)}")
    n = int(y.shape[0])
    if n >= limit:
        reject(path, "wrong_length",
               f"longer than {target + tol:g} s (schedule.audio_snippet_seconds = {target:g} "
               f"± intake.audio_length_tolerance_seconds = {tol:g})")
    if claimed is not None and n < claimed:
        reject(path, "truncated", f"{n} of the {claimed} frames the header claims are present")
    if header_frames is not None and n < header_frames:
        reject(path, "truncated", f"decoded {n} of {header_frames} frames")
    if n == 0:
        reject(path, "truncated", "no audio frames")
    dur = n / orig_sr
    if abs(dur - target) > tol + 0.5 / orig_sr:
        reject(path, "wrong_length",
               f"{dur:.3f} s, expected {target:g} ± {tol:g} s "
               "(schedule.audio_snippet_seconds ± intake.audio_length_tolerance_seconds)")
    # The extremes answer three checks in two passes: a NaN or an infinity is in
    # them (numpy's min and max propagate NaN), the swing of a mono signal is
    # their difference, and only a signal reaching CLIP_LEVEL needs a clip count.
    lo, hi = float(y.min()), float(y.max())
    if not (math.isfinite(lo) and math.isfinite(hi)):
        reject(path, "silent_corrupt", "samples are NaN or infinite")
    mono = _mix_down(y)
    swing = hi - lo if channels == 1 else float(mono.max()) - float(mono.min())
    if swing < CONSTANT_PTP:
        reject(path, "silent_corrupt", "the signal is constant (all zero or a stuck DC level)")
    t = stamp_from_name(path)
    if t is None:
        reject(path, "bad_timestamp", "the file name carries no start time YYYYMMDDTHHMMSSZ")
    why = plausible_time(t, now)
    if why:
        reject(path, "bad_timestamp", f"start time in the file name is {why}")
    warnings = []
    clipped = int(np.count_nonzero(np.abs(y) >= CLIP_LEVEL)) if max(hi, -lo) >= CLIP_LEVEL else 0
    if clipped > CLIP_FRACTION * y.size:
        warnings.append(f"{clipped} of {y.size} samples at full scale (clipped recording)")
    sr = int(policy.intake.audio_sr)
    mono = np.ascontiguousarray(mono, dtype=np.float32)
    if orig_sr != sr:
        mono = resample(mono, orig_sr, sr)
    return AudioClip(y=mono, sr=sr, t=t, orig_sr=orig_sr, channels=channels, n_frames=n,
                     warnings=warnings)


def _mix_down(y: np.ndarray) -> np.ndarray:
    """The mean of the channels, ``y.mean(axis=1)``, added channel by channel.

    numpy's reduction along a short last axis costs a loop per frame: 9 ms for
    3 s of 44.1 kHz stereo against 0.2 ms this way (measured).  Up to 7
    channels the additions are numpy's, in the same order, so the result is
    identical; with 8, numpy sums in pairs and the last bit may differ.
    """
    channels = y.shape[1]
    if channels == 1:
        return y[:, 0]
    mono = y[:, 0] + y[:, 1]
    for c in range(2, channels):
        mono += y[:, c]
    mono /= np.float32(channels)
    return mono


def resample(y: np.ndarray, orig_sr: int, sr: int) -> np.ndarray:
    """Band-limited resampling, as ``librosa.resample(res_type=RES_TYPE)``.

    Calls ``soxr.resample(..., quality="soxr_hq")`` directly, exactly what
    librosa does for that ``res_type`` (tested equal); librosa itself is a test
    dependency only (``docs/features.md``).
    """
    import soxr

    return np.asarray(soxr.resample(y, orig_sr, sr, quality="soxr_hq"), dtype=np.float32)


def _wav_claimed_frames(path, data: bytes) -> int | None:
    """Frames the RIFF header promises, or ``None`` if it cannot say."""
    if len(data) < 12 or data[8:12] != b"WAVE":
        return None
    pos = 12
    block_align = None
    while pos + 8 <= len(data):
        cid = data[pos:pos + 4]
        (size,) = struct.unpack_from("<I", data, pos + 4)
        body = pos + 8
        if cid == b"fmt " and size >= 16 and body + 16 <= len(data):
            block_align = struct.unpack_from("<H", data, body + 12)[0]
        elif cid == b"data":
            if size in (0, 0xFFFFFFFF):
                # A streaming writer that never finalised its header.
                reject(path, "truncated", "the WAV data chunk size was never written")
            available = len(data) - body
            if size > available:
                reject(path, "truncated",
                       f"the WAV data chunk claims {size} bytes but {available} are present")
            return size // block_align if block_align else None
        pos = body + size + (size & 1)  # chunks are padded to even length
    return None


def _flac_claimed_frames(data: bytes) -> int | None:
    """Total samples from FLAC STREAMINFO (0 means "unknown")."""
    if len(data) < 42 or (data[4] & 0x7F) != 0:
        return None
    (word,) = struct.unpack_from(">Q", data, 8 + 10)
    total = word & ((1 << 36) - 1)
    return total or None


def _short(e: Exception) -> str:
    msg = str(e)
    # soundfile prefixes "Error opening <_io.BytesIO object at 0x…>: "
    if ">: " in msg:
        msg = msg.split(">: ", 1)[1]
    return msg.strip()[:120] or type(e).__name__
