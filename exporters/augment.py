"""Audio augmentation for an archive's conditions: speed, noise and music beds, telephone/AM
band-limiting, a lossy-codec round trip, gain. Pure functions of (signal, rng)."""

from __future__ import annotations

import io

import numpy as np
from scipy.signal import butter, sosfilt

SR = 16000


def speed(x: np.ndarray, factor: float) -> np.ndarray:
    """Play `factor` times faster (pitch moves too, like tape speed). Durations scale by 1/factor."""
    import soxr

    return soxr.resample(x, SR * factor, SR, quality="HQ").astype(np.float32)


def coloured_noise(n: int, rng: np.random.Generator, slope: float = -1.0) -> np.ndarray:
    """Noise with power spectrum ~ f**slope (0 white, -1 pink)."""
    spec = np.fft.rfft(rng.standard_normal(n))
    f = np.maximum(np.fft.rfftfreq(n, 1 / SR), 20.0)
    y = np.fft.irfft(spec * f ** (slope / 2), n)
    return (y / (np.std(y) + 1e-9)).astype(np.float32)


def music_bed(n: int, rng: np.random.Generator) -> np.ndarray:
    """A synthetic music bed: harmonic chords changing every 1-3 s, and a percussive pulse."""
    t = np.arange(n) / SR
    y = np.zeros(n, np.float32)
    pos = 0
    while pos < n:
        seg = int(SR * rng.uniform(1.0, 3.0))
        root = 110 * 2 ** (rng.integers(0, 12) / 12)
        for ratio in (1.0, 1.26, 1.5, 2.0)[: rng.integers(2, 5)]:
            f0 = root * ratio
            tt = t[pos:pos + seg]
            env = np.minimum(1, (tt - tt[0]) * 20) * np.exp(-(tt - tt[0]) * rng.uniform(0.2, 1.5))
            for h in range(1, 5):
                y[pos:pos + seg] += (env * np.sin(2 * np.pi * f0 * h * tt + rng.uniform(0, 6)) / h).astype(np.float32)
        pos += seg
    beat = int(SR * rng.uniform(0.35, 0.6))
    click = (np.exp(-np.arange(800) / 120) * rng.standard_normal(800)).astype(np.float32)
    for p in range(int(rng.integers(0, beat)), n - 800, beat):
        y[p:p + 800] += 0.8 * click
    return y / (np.std(y) + 1e-9)


def mix(x: np.ndarray, bed: np.ndarray, snr_db: float) -> np.ndarray:
    px = np.mean(x**2) + 1e-12
    pb = np.mean(bed**2) + 1e-12
    return (x + bed * np.sqrt(px / (pb * 10 ** (snr_db / 10)))).astype(np.float32)


def band_limit(x: np.ndarray, low: float, high: float) -> np.ndarray:
    sos = butter(4, [low, high], btype="band", fs=SR, output="sos")
    return sosfilt(sos, x).astype(np.float32)


def telephone(x: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    y = band_limit(x, 300, 3400)
    drive = rng.uniform(1.0, 4.0)
    return (np.tanh(drive * y / (np.abs(y).max() + 1e-9)) / np.tanh(drive)).astype(np.float32) * 0.5


def codec_round_trip(x: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    import soundfile as sf

    buf = io.BytesIO()
    subtype = "VORBIS" if rng.random() < 0.5 else "OPUS"
    sf.write(buf, np.clip(x, -1, 1), SR, format="OGG", subtype=subtype)
    buf.seek(0)
    y, _ = sf.read(buf, dtype="float32")
    return y[: len(x)] if len(y) >= len(x) else np.pad(y, (0, len(x) - len(y)))


def gain(x: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    y = x / (np.abs(x).max() + 1e-9) * 10 ** (rng.uniform(-26, -1) / 20)
    return y.astype(np.float32)


def radio_chain(x: np.ndarray, rng: np.random.Generator) -> tuple[np.ndarray, float, float]:
    """One random archive condition. Returns (signal, speed factor, seconds of music-only lead-in)."""
    f = float(rng.choice([0.9, 0.95, 1.0, 1.05, 1.1]))
    y = speed(x, f) if f != 1.0 else x.copy()
    lead = 0.0
    r = rng.random()
    if r < 0.45:
        lead = float(rng.uniform(0.6, 1.5)) if rng.random() < 0.5 else 0.0
        y = np.concatenate([np.zeros(int(lead * SR), np.float32), y])
        bed = music_bed(len(y), rng)
        y = mix(y, bed, rng.uniform(5, 25))
        if lead:
            y[: int(lead * SR)] = bed[: int(lead * SR)] * np.std(y[int(lead * SR):]) * 10 ** (-rng.uniform(5, 15) / 20)
    y = mix(y, coloured_noise(len(y), rng, slope=float(rng.choice([0.0, -1.0]))), rng.uniform(10, 35))
    c = rng.random()
    if c < 0.3:
        y = telephone(y, rng)
    elif c < 0.5:
        y = band_limit(y, 80, 4500)
    if rng.random() < 0.2:
        y = codec_round_trip(y, rng)
    return gain(y, rng), f, lead
