"""Span pooling: a window's input to the span head, from the frame encoder's outputs.

A span (a, b) in encoder frames (20 ms each) is described by the means of its three
thirds, its first and last frame, and its log duration. With prefix sums of the frame
outputs every window costs O(1), whatever its length. Training uses the same
arithmetic (exporters/model.py mirrors it in torch).
"""

from __future__ import annotations

import numpy as np

FRAME_SECONDS = 0.02  # the frame encoder halves the 10 ms feature rate
MIN_FRAMES = 3


def to_frames(seconds: np.ndarray) -> np.ndarray:
    return np.rint(np.asarray(seconds, dtype=np.float64) / FRAME_SECONDS).astype(np.int64)


def prefix_sums(frames: np.ndarray) -> np.ndarray:
    """(T, H) frame outputs -> (T + 1, H) float64 prefix sums, row 0 zero."""
    p = np.zeros((frames.shape[0] + 1, frames.shape[1]), dtype=np.float64)
    np.cumsum(frames, axis=0, out=p[1:])
    return p


def span_bounds(a: np.ndarray, b: np.ndarray, n_frames: int) -> tuple[np.ndarray, np.ndarray]:
    """Clamp frame spans to the signal and to at least MIN_FRAMES frames."""
    a = np.clip(np.asarray(a, np.int64), 0, max(0, n_frames - MIN_FRAMES))
    b = np.clip(np.asarray(b, np.int64), a + MIN_FRAMES, n_frames)
    return a, b


def pool(frames: np.ndarray, prefix: np.ndarray, a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Pooled span descriptors, shape (n, 5H + 1), float32. `a`, `b` are frame indices, b - a >= 3."""
    n = b - a
    c1 = a + (n + 1) // 3
    c2 = a + (2 * n + 1) // 3

    def mean(lo, hi):
        return (prefix[hi] - prefix[lo]) / (hi - lo)[:, None]

    parts = [mean(a, c1), mean(c1, c2), mean(c2, b), frames[a], frames[b - 1],
             np.log(n * FRAME_SECONDS)[:, None]]
    return np.concatenate(parts, axis=1).astype(np.float32)
