"""Log-mel features: the one feature function used by training and by search.

Pure functions over numpy arrays. The parameters are pinned in the model card
(`models/card.json`, key "features"); the runtime refuses a card that disagrees
with FEATURE_PARAMS.
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np

FEATURE_PARAMS = {
    "sample_rate": 16000,
    "n_mels": 40,
    "n_fft": 512,  # FFT size (zero-padded)
    "win_length": 400,  # 25 ms analysis window
    "hop_length": 160,  # 10 ms hop
    "window": "hann",
    "fmin": 60.0,
    "fmax": 7600.0,
    "mel_scale": "slaney",
    "log_floor": 1e-6,
    "log": "natural",
    "center": "zero-padded by win_length/2 at both ends of the signal",
    # inside the model files, so each card describes its own (exporters/export_onnx.py); not compared
    "normalisation": "fixed per-band mean/std from training data, applied inside the frame encoder",
}

SAMPLE_RATE = FEATURE_PARAMS["sample_rate"]
HOP_SECONDS = FEATURE_PARAMS["hop_length"] / SAMPLE_RATE


@lru_cache(maxsize=4)
def _mel_basis(sample_rate: int, n_fft: int, n_mels: int, fmin: float, fmax: float) -> np.ndarray:
    import librosa

    return librosa.filters.mel(
        sr=sample_rate, n_fft=n_fft, n_mels=n_mels, fmin=fmin, fmax=fmax, htk=False, norm="slaney"
    ).astype(np.float32)


def n_frames(n_samples: int) -> int:
    """Number of feature frames log_mel returns for a signal of n_samples."""
    return 1 + n_samples // FEATURE_PARAMS["hop_length"]


def log_mel(samples: np.ndarray, chunk_frames: int = 20000) -> np.ndarray:
    """Log-mel energies of a mono float signal at SAMPLE_RATE.

    Returns an array of shape (n_frames, n_mels), float32. Frame t is centred on
    sample t * hop_length; the signal is zero-padded by win_length/2 at both ends, so
    each frame depends only on the 25 ms of audio around it. Long signals are
    processed in chunks (same result, bounded memory).
    """
    p = FEATURE_PARAMS
    x = np.asarray(samples, dtype=np.float32)
    if x.ndim != 1:
        raise ValueError("log_mel expects a mono 1-D signal")
    import scipy.fft

    n_fft, win, hop = p["n_fft"], p["win_length"], p["hop_length"]
    basis = _mel_basis(p["sample_rate"], n_fft, p["n_mels"], p["fmin"], p["fmax"])
    window = np.hanning(win + 1)[:-1].astype(np.float32)  # periodic Hann, as scipy/librosa
    padded = np.pad(x, (win // 2, win // 2))
    total = n_frames(len(x))
    out = np.empty((total, p["n_mels"]), dtype=np.float32)
    for t0 in range(0, total, chunk_frames):
        t1 = min(total, t0 + chunk_frames)
        seg = padded[t0 * hop : (t1 - 1) * hop + win]
        frames = np.lib.stride_tricks.sliding_window_view(seg, win)[::hop]
        spec = scipy.fft.rfft(frames * window, n=n_fft, axis=1, workers=-1)
        power = spec.real**2 + spec.imag**2
        out[t0:t1] = np.log(power @ basis.T + p["log_floor"])
    return out
