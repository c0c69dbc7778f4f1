"""Letter posteriors and keyword scoring: the second look at a candidate hit.

The letter head (models/letter_head.onnx) turns the frame encoder's 20 ms frames into
per-frame log-probabilities over the model's base letters plus a CTC blank (class 0).
Indexing stores them, quantised to one byte (0.1 nat steps), beside the window vectors.
Search aligns a term's letters to the posteriors of each candidate's stretch of audio with
a CTC Viterbi pass whose start and end are free (keyword scoring; CTC: Graves et al.,
ICML 2006): frames outside the alignment cost nothing, frames inside cost how far the
aligned symbol falls below the frame's best symbol. A term spoken there aligns at a cost
near zero; a near-homophone pays for each letter it gets wrong.

Pure functions over numpy arrays, apart from `letter_logprobs`, which runs the ONNX head.
"""

from __future__ import annotations

import unicodedata

import numpy as np

from .spelling import letters

QUANT_STEP = 0.1  # nats per stored unit
QUANT_MAX = 255
CHUNK = 3000  # 20 ms frames per head pass on long broadcasts
LETTER_FLOOR = -8.0  # lowest alignment cost per letter counted (no alignment fits: this)


def alphabet_of(symbols: list[str]) -> list[str]:
    """The letter head's classes (after the blank): the base letters of the spelling inventory."""
    return [c for c in symbols if len(c) == 1 and c.isalpha() and not unicodedata.combining(c)]


def letter_ids(text: str, table: dict[str, int]) -> list[int]:
    """Class ids of a spelling's base letters (marks removed); letters the model lacks are left out."""
    return [table[c] for c in letters(text) if c in table]


def letter_logprobs(models, logmel: np.ndarray, frames: np.ndarray) -> np.ndarray:
    """(len(frames), n_letters + 1) log-probabilities; long inputs in chunks with enough overlap
    that the result equals one pass over the whole input."""
    sess = models.sessions["letters"]
    n = len(frames)
    pad = int(models.card["letters"]["receptive_frames"]) + 4
    out = []
    for s in range(0, max(n, 1), CHUNK):
        lo, hi = max(0, s - pad), min(n, s + CHUNK + pad)
        y = sess.run(None, {"frames": frames[None, lo:hi].astype(np.float32),
                            "logmel": logmel[None, 2 * lo : min(len(logmel), 2 * hi)].astype(np.float32)})[0][0]
        out.append(y[s - lo : s - lo + min(CHUNK, n - s)])
    return np.concatenate(out) if out else np.zeros((0, 1), np.float32)


def quantise(logp: np.ndarray) -> np.ndarray:
    return np.clip(np.rint(-logp / QUANT_STEP), 0, QUANT_MAX).astype(np.uint8)


def dequantise(q: np.ndarray) -> np.ndarray:
    return -q.astype(np.float32) * QUANT_STEP


def per_letter(cost: np.ndarray, n_letters: int) -> np.ndarray:
    """Alignment cost per letter, floored at LETTER_FLOOR (-inf, no alignment, counts as the floor):
    the letter view's evidence, in search and in rule learning alike."""
    return np.maximum(np.asarray(cost, np.float64) / max(1, n_letters), LETTER_FLOOR)


def keyword_scores(regions: list[np.ndarray], ids: list[int],
                   with_times: bool = True) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Best free-start, free-end CTC alignment of letters `ids` in each region of log-probs.

    regions: list of (T_i, n_letters + 1) arrays. Returns (cost, first, last): cost <= 0 is the
    summed shortfall of the aligned symbols below each frame's best symbol (0 = the term is
    exactly what the head hears there), first/last the aligned frames (-1 when no alignment fits;
    always -1 with `with_times=False`, which finds the same costs faster, e.g. for a background).
    """
    C = len(regions)
    if C == 0 or not ids:
        return np.full(C, -np.inf), np.full(C, -1), np.full(C, -1)
    T = max(len(r) for r in regions)
    V = regions[0].shape[1]
    d = np.full((C, T, V), -np.inf, np.float32)
    for i, r in enumerate(regions):
        d[i, : len(r)] = r - r.max(axis=1, keepdims=True)
    lab = np.zeros(2 * len(ids) - 1, np.int64)  # states: letter, blank, letter, ... letter
    lab[0::2] = ids
    S = len(lab)
    skip = np.zeros(S, bool)  # letter -> next letter directly, unless the two are the same letter
    skip[2::2] = np.asarray(ids[1:]) != np.asarray(ids[:-1])
    D = np.full((C, S), -np.inf, np.float32)
    start = np.zeros((C, S), np.int64)
    best = np.full(C, -np.inf, np.float32)
    first = np.full(C, -1, np.int64)
    last = np.full(C, -1, np.int64)
    ninf = np.float32(-np.inf)
    fresh = np.full((C, S), ninf)  # a new alignment may begin, at no cost so far, in the first state
    fresh[:, 0] = 0.0
    if not with_times:
        for t in range(T):
            adv = np.concatenate([np.full((C, 1), ninf), D], axis=1)[:, :S]
            jump = np.where(skip, np.concatenate([np.full((C, 2), ninf), D], axis=1)[:, :S], ninf)
            D = np.maximum(np.maximum(D, adv), np.maximum(jump, fresh)) + d[:, t, lab]
            best = np.maximum(best, D[:, -1])
        return best.astype(np.float64), first, last
    for t in range(T):
        stay = D
        adv = np.concatenate([np.full((C, 1), ninf), D], axis=1)[:, :S]
        jump = np.where(skip, np.concatenate([np.full((C, 2), ninf), D], axis=1)[:, :S], ninf)
        cands = np.stack([stay, adv, jump, fresh])
        k = cands.argmax(axis=0)
        prev_start = np.stack([start, np.concatenate([start[:, :1], start], axis=1)[:, :S],
                               np.concatenate([start[:, :1], start[:, :1], start], axis=1)[:, :S], np.full((C, S), t)])
        start = np.take_along_axis(prev_start, k[None], axis=0)[0]
        D = np.take_along_axis(cands, k[None], axis=0)[0] + d[:, t, lab]
        better = D[:, -1] > best
        best = np.where(better, D[:, -1], best)
        first = np.where(better, start[:, -1], first)
        last = np.where(better, t, last)
    return best.astype(np.float64), first, last
