"""Refining hit times from the audio: the index stores windows at a coarse hop; a hit's start and
end are re-estimated at the encoder's 20 ms resolution by scoring nearby spans of the recording.

Only the times change: the hit's score stays the index's, so ranking and calibration are unaffected.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from . import audio
from .features import SAMPLE_RATE, log_mel
from .pooling import FRAME_SECONDS, pool, prefix_sums

CONTEXT = 1.0  # seconds of audio either side, as the API uses
SHIFT = 0.10  # how far a boundary may move, seconds
SCALES = (0.8, 0.9, 1.0, 1.12, 1.25)


def read_excerpt(path: Path, start: float, end: float) -> tuple[np.ndarray, float]:
    """Mono 16 kHz samples of [start, end] (clipped to the file) and the time of the first sample."""
    import soundfile as sf

    info = sf.info(str(path))
    a = max(0, int(start * info.samplerate))
    b = min(info.frames, int(np.ceil(end * info.samplerate)))
    x, _ = sf.read(str(path), start=a, stop=b, dtype="float32", always_2d=True)
    x = x.mean(axis=1)
    if info.samplerate != SAMPLE_RATE:
        x = audio.resample(x, info.samplerate)
    return x, a / info.samplerate


def refine(models, vector: np.ndarray, path: Path, start: float, end: float) -> tuple[float, float]:
    """The best-matching span near (start, end) for the query vector, in seconds."""
    x, t0 = read_excerpt(path, start - CONTEXT - SHIFT, end + CONTEXT + SHIFT)
    frames = models.frames(log_mel(x))
    n = len(frames)
    a0 = int(round((start - t0) / FRAME_SECONDS))
    length = int(round((end - start) / FRAME_SECONDS))
    k = int(round(SHIFT / FRAME_SECONDS))
    cand = [(a0 + da, a0 + da + max(3, int(round(length * s)))) for da in range(-k, k + 1) for s in SCALES]
    cand = [(a, b) for a, b in cand if a >= 0 and b <= n]
    if not cand:
        return start, end
    a = np.array([c[0] for c in cand])
    b = np.array([c[1] for c in cand])
    v = models.head(pool(frames, prefix_sums(frames), a, b)) @ vector
    best = int(np.argmax(v))
    return round(t0 + a[best] * FRAME_SECONDS, 3), round(t0 + b[best] * FRAME_SECONDS, 3)


def refine_hits(hits, vector: np.ndarray, archive: Path, models) -> int:
    """Refine the times of hits in place (those not already letter-aligned); returns how many were refined."""
    done = 0
    for h in hits:
        if h.aligned:  # the letter alignment already placed it at 20 ms resolution
            continue
        src = Path(archive) / h.broadcast
        try:
            h.start, h.end = refine(models, vector, src, h.start, h.end)
            done += 1
        except Exception:  # audio moved or unreadable: keep the index's times
            continue
    return done
