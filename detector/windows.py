"""Windows: the candidate spans of a broadcast that the index stores.

Each window schedule entry is (duration s, hop s); windows of every duration start on
the encoder's 20 ms grid, inside the speech regions the gate kept.
"""

from __future__ import annotations

import numpy as np

from .pooling import FRAME_SECONDS


def enumerate_windows(regions: list[tuple[float, float]], schedule: list[tuple[float, float]],
                      n_frames: int) -> tuple[np.ndarray, np.ndarray]:
    """Start frames (int32) and schedule indices (uint8) of all windows inside the regions."""
    starts, kinds = [], []
    for k, (dur, hop) in enumerate(schedule):
        length = int(round(dur / FRAME_SECONDS))
        step = max(1, int(round(hop / FRAME_SECONDS)))
        for lo, hi in regions:
            a0 = int(round(lo / FRAME_SECONDS))
            a1 = min(int(round(hi / FRAME_SECONDS)), n_frames) - length
            if a1 < a0:
                if min(int(round(hi / FRAME_SECONDS)), n_frames) - a0 >= length * 0.75 and a0 + length <= n_frames:
                    a1 = a0  # a region a little shorter than the window still gets one
                else:
                    continue
            s = np.arange(a0, a1 + 1, step, dtype=np.int32)
            starts.append(s)
            kinds.append(np.full(len(s), k, np.uint8))
    if not starts:
        return np.zeros(0, np.int32), np.zeros(0, np.uint8)
    return np.concatenate(starts), np.concatenate(kinds)


def window_frames(starts: np.ndarray, kinds: np.ndarray, schedule) -> tuple[np.ndarray, np.ndarray]:
    lengths = np.array([int(round(d / FRAME_SECONDS)) for d, _ in schedule], np.int64)
    a = starts.astype(np.int64)
    return a, a + lengths[kinds]


def window_times(starts: np.ndarray, kinds: np.ndarray, schedule) -> tuple[np.ndarray, np.ndarray]:
    a, b = window_frames(starts, kinds, schedule)
    return a * FRAME_SECONDS, b * FRAME_SECONDS
