"""Levenshtein distances between many short symbol strings at once (numpy, vectorised over pairs)."""

from __future__ import annotations

import numpy as np


def encode(strings: list[list[str]], table: dict[str, int]) -> tuple[np.ndarray, np.ndarray]:
    L = max(1, max(len(s) for s in strings))
    codes = np.full((len(strings), L), -1, np.int32)
    for i, s in enumerate(strings):
        codes[i, : len(s)] = [table.setdefault(c, len(table)) for c in s]
    return codes, np.array([len(s) for s in strings])


def pairwise(a: list[list[str]], b: list[list[str]]) -> np.ndarray:
    """(len(a), len(b)) matrix of edit distances (unit insert, delete, substitute)."""
    table: dict[str, int] = {}
    ca, la = encode(a, table)
    cb, lb = encode(b, table)
    n, m, La, Lb = len(a), len(b), ca.shape[1], cb.shape[1]
    # rows of the DP table are laid out (j, n, m) so that every step works on contiguous planes
    prev = np.broadcast_to(np.arange(Lb + 1, dtype=np.int16)[:, None, None], (Lb + 1, n, m)).copy()
    out = np.zeros((n, m), np.int16)
    out[la == 0] = lb[None, :]
    for i in range(1, La + 1):
        cur = np.empty_like(prev)
        cur[0] = i
        ai = ca[:, i - 1][:, None]
        for j in range(1, Lb + 1):
            sub = prev[j - 1] + (ai != cb[None, :, j - 1])
            np.minimum(np.minimum(prev[j], cur[j - 1]) + 1, sub, out=cur[j])
        rows = la == i
        if rows.any():
            out[rows] = np.take_along_axis(cur[:, rows, :], lb[None, None, :], axis=0)[0]
        prev = cur
    return out.astype(np.int32)
