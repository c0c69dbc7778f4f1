"""Public Python API: the two encoders, mapping spellings and audio spans into one space.

    from detector import api
    vectors = api.embed_spellings(["kalumbero"])                    # (n, d), unit rows
    spans = api.embed_spans(samples, 44100, [(1.20, 1.75)])         # (n, d), unit rows
    logp = api.letter_posteriors(samples, 44100)                    # (frames, 1 + letters), 20 ms frames

A span's vector uses the audio from context_seconds() before it to context_seconds() after
it and nothing beyond, so the same span gives the same vector in a short excerpt and in a
whole broadcast (given that much audio around it in both).
"""

from __future__ import annotations

import numpy as np

from . import audio
from .features import SAMPLE_RATE, log_mel
from .models import load
from .pooling import FRAME_SECONDS, pool, prefix_sums, to_frames
from .spelling import letters, symbols

CONTEXT_SECONDS = 1.0  # audio used on either side of a span, at least (the contract allows up to 2 s)
MAX_CONTEXT_SECONDS = 2.0


def context_seconds(models) -> float:
    """Audio taken either side of a span: CONTEXT_SECONDS, or the frame encoder's whole
    receptive field where that is wider (a model with a sliding mean sees further), at most 2 s."""
    return min(MAX_CONTEXT_SECONDS, max(CONTEXT_SECONDS, (models.context_frames + 2) * FRAME_SECONDS))


def embed_spellings(words: list[str], models_dir: str | None = None) -> np.ndarray:
    """Unit vectors (n, d), float32, for typed spellings (any Unicode normalisation, any case)."""
    if isinstance(words, str) or not isinstance(words, (list, tuple)):
        raise ValueError("embed_spellings expects a list of words")
    if not words:
        raise ValueError("embed_spellings got an empty list of words")
    bad = [w for w in words if not isinstance(w, str) or not letters(w)]
    if bad:
        raise ValueError(f"these words have no letters to embed: {bad[:5]!r}")
    m = load(models_dir)
    out = np.stack([m.spelling(symbols(w)) for w in words]).astype(np.float32)
    return out / np.linalg.norm(out, axis=1, keepdims=True)


def _check_spans(spans, duration: float) -> np.ndarray:
    if not isinstance(spans, (list, tuple, np.ndarray)) or len(spans) == 0:
        raise ValueError("embed_spans needs a non-empty list of (start, end) spans in seconds")
    arr = np.asarray(spans, dtype=np.float64)
    if arr.ndim != 2 or arr.shape[1] != 2:
        raise ValueError("each span must be a (start, end) pair of seconds")
    if not np.isfinite(arr).all():
        raise ValueError("span times must be finite numbers")
    for i, (s, e) in enumerate(arr):
        if s < 0:
            raise ValueError(f"span {i} starts before the signal ({s:.3f} s)")
        if e <= s:
            raise ValueError(f"span {i} is empty or reversed ({s:.3f} s to {e:.3f} s)")
        if e - s < 3 * FRAME_SECONDS - 1e-9:
            raise ValueError(f"span {i} is shorter than {3 * FRAME_SECONDS:.2f} s")
        if e > duration + 1e-3:
            raise ValueError(f"span {i} ends at {e:.3f} s, past the end of the signal ({duration:.3f} s)")
    return arr


def embed_spans(samples: np.ndarray, sample_rate: int, spans: list[tuple[float, float]],
                models_dir: str | None = None) -> np.ndarray:
    """Unit vectors (n, d), float32, for (start, end) spans of one mono signal at any sample rate."""
    x = audio.as_mono(samples, sample_rate)
    if sample_rate != SAMPLE_RATE:
        x = audio.resample(x, sample_rate)
    arr = _check_spans(spans, len(x) / SAMPLE_RATE)
    m = load(models_dir)
    out = np.empty((len(arr), m.dim), np.float32)
    c = int(round(context_seconds(m) * SAMPLE_RATE))
    for i, (s, e) in enumerate(arr):
        s_i, e_i = int(round(s * SAMPLE_RATE)), int(round(e * SAMPLE_RATE))
        lo, hi = max(0, s_i - c), min(len(x), e_i + c)
        frames = m.frames(log_mel(x[lo:hi]))
        a = to_frames([(s_i - lo) / SAMPLE_RATE])
        b = np.maximum(to_frames([(e_i - lo) / SAMPLE_RATE]), a + 3)
        b = np.minimum(b, len(frames))
        a = np.minimum(a, b - 3)
        out[i] = m.head(pool(frames, prefix_sums(frames), a, b))[0]
    return out / np.linalg.norm(out, axis=1, keepdims=True)


def letter_posteriors(samples: np.ndarray, sample_rate: int, models_dir: str | None = None) -> np.ndarray:
    """Log-probabilities (frames, 1 + letters) of the letter head over a mono signal, one row per
    20 ms frame, column 0 the CTC blank: what indexing stores (quantised) for the letter pass."""
    from .letters import letter_logprobs

    x = audio.as_mono(samples, sample_rate)
    if sample_rate != SAMPLE_RATE:
        x = audio.resample(x, sample_rate)
    m = load(models_dir)
    if not m.has_letters:
        raise ValueError(f"the models in {m.dir} have no letter head")
    feats = log_mel(x)
    return letter_logprobs(m, feats, m.frames(feats))
