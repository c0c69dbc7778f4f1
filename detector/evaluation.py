"""Scoring hit lists against reference word timings.

Two families of measures:

* ``average_precision``: pooled average precision of scored pairs, the
  step-wise definition over distinct thresholds (the one scikit-learn uses).
* Term-weighted value (TWV) following the NIST 2006 spoken term detection
  evaluation plan: ``atwv`` at a given threshold, ``mtwv`` at the best one,
  ``term_breakdown`` per term, plus ``precision_at_k`` and ``recall_at_k``.

Hits are matched to reference occurrences by ``match_hits``: a hit is correct
when its midpoint lies within ``tolerance`` seconds of the midpoint of a
not-yet-matched reference occurrence of the same term in the same broadcast.
Hits are visited in order of decreasing score (ties: input order) and each
reference occurrence is matched at most once, so a second hit on an occurrence
already taken is a false alarm. Because higher-scoring hits are matched first,
the matches of the hits at or above any threshold do not depend on the hits
below it: one matching serves every threshold.

Hits are any objects with ``term``, ``broadcast``, ``start``, ``end`` and the
ranking attribute (``score`` unless ``key`` names another attribute, such as
``confidence``, or is a function of the hit).
"""

from __future__ import annotations

import csv
import io
import math
from bisect import bisect_left, bisect_right
from collections import defaultdict
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Iterable, Sequence, Union

import numpy as np

from . import TrawlError
from .spelling import strip_marks, word_type

Reference = tuple[str, float, float, str]  # (broadcast, start, end, word)
Key = Union[str, Callable[[Any], float]]

DEFAULT_BETA = 999.9  # NIST 2006 STD evaluation plan
DEFAULT_TOLERANCE = 0.5  # seconds between midpoints
# Slack for comparing float midpoints with the tolerance, so that a distance of
# exactly 0.5 s computed from decimal timings is not lost to rounding.
_EPS = 1e-9


# --------------------------------------------------------------------------
# Average precision


def average_precision(scores: Sequence[float], labels: Sequence[Any]) -> float:
    """Pooled average precision of scored pairs; positive = truthy label.

    AP = sum over distinct score thresholds t (descending) of
    (R(t) - R(t_prev)) * P(t), where P and R are the precision and recall of
    all pairs scoring >= t. Tied scores enter together, exactly as in
    ``sklearn.metrics.average_precision_score``. With no positive pair the
    value is 0.0 (also as scikit-learn returns).
    """
    s = np.asarray(scores, dtype=float).ravel()
    y = np.asarray(labels).astype(bool).ravel()
    if s.shape != y.shape:
        raise ValueError(f"{s.size} scores but {y.size} labels")
    if s.size == 0:
        raise ValueError("average precision of no pairs")
    if np.isnan(s).any():
        raise ValueError("scores contain NaN")
    n_pos = int(y.sum())
    if n_pos == 0:
        return 0.0
    order = np.argsort(-s, kind="mergesort")
    s, y = s[order], y[order]
    # last index of each run of equal scores: the distinct thresholds
    last = np.r_[np.nonzero(np.diff(s))[0], s.size - 1]
    tp = np.cumsum(y)[last].astype(float)
    precision = tp / (last + 1)
    recall_gain = np.diff(np.r_[0.0, tp]) / n_pos
    return float(np.sum(recall_gain * precision))


# --------------------------------------------------------------------------
# Matching


def ranked_ap(positives: Sequence[float], negatives: Sequence[float]) -> float:
    """Average precision of the positives' scores ranked among the negatives' (the held-out checks
    of `trawl adapt`: a term's confirmed hits among every other hit and the archive sample)."""
    pos, neg = np.asarray(positives, float).ravel(), np.asarray(negatives, float).ravel()
    return average_precision(np.concatenate([pos, neg]), np.r_[np.ones(len(pos)), np.zeros(len(neg))])


def _normaliser(accent_insensitive: bool) -> Callable[[str], str]:
    if accent_insensitive:
        return lambda text: strip_marks(word_type(text))
    return word_type


def _key_function(key: Key) -> Callable[[Any], float]:
    if callable(key):
        return key
    return lambda hit: getattr(hit, key)


def _ranking(hits: Sequence[Any], key: Key) -> np.ndarray:
    """Indices of hits by decreasing key; ties keep input order."""
    get = _key_function(key)
    values = np.array([float(get(h)) for h in hits], dtype=float)
    if np.isnan(values).any():
        raise TrawlError("a hit has no score to rank by (NaN)")
    return np.argsort(-values, kind="mergesort")


def reference_occurrences(
    reference: Iterable[Reference],
    terms: Iterable[str],
    accent_insensitive: bool = False,
    max_gap: float = 0.5,
) -> dict[str, list[tuple[str, float, float]]]:
    """Occurrences ``(broadcast, start, end)`` of each term in the reference.

    Keys are the terms' normalised types. A term of one word occurs wherever
    the reference word has the same type. A term of several words occurs where
    consecutive reference words of one broadcast (ordered by start) spell it,
    each gap between them at most ``max_gap`` seconds (the NIST rule for
    multi-word terms, from memory); the occurrence spans first start to last
    end.
    """
    norm = _normaliser(accent_insensitive)
    wanted = {norm(t) for t in terms}
    out: dict[str, list[tuple[str, float, float]]] = {t: [] for t in wanted}
    phrases = {t: t.split() for t in wanted if len(t.split()) > 1}
    by_broadcast: dict[str, list[tuple[float, float, str]]] = defaultdict(list)
    for broadcast, start, end, word in reference:
        w = norm(word)
        if w in out:
            out[w].append((broadcast, float(start), float(end)))
        if phrases:
            by_broadcast[broadcast].append((float(start), float(end), w))
    for term, parts in phrases.items():
        n = len(parts)
        for broadcast, words in by_broadcast.items():
            words.sort()
            for i in range(len(words) - n + 1):
                run = words[i : i + n]
                if [w for _, _, w in run] != parts:
                    continue
                if all(run[j + 1][0] - run[j][1] <= max_gap + _EPS for j in range(n - 1)):
                    out[term].append((broadcast, run[0][0], run[-1][1]))
    return out


def match_hits(
    hits: Sequence[Any],
    reference: Iterable[Reference],
    tolerance: float = DEFAULT_TOLERANCE,
    key: Key = "score",
    accent_insensitive: bool = False,
) -> list[bool]:
    """For each hit (in the order given): is it a correct detection?

    Hits are visited by decreasing ``key``; each takes the nearest (by
    midpoint) reference occurrence of its term in its broadcast that is still
    unmatched and whose midpoint lies within ``tolerance`` seconds of the
    hit's midpoint (inclusive). Each occurrence is matched at most once.
    """
    hits = list(hits)
    norm = _normaliser(accent_insensitive)
    occurrences = reference_occurrences(reference, {h.term for h in hits}, accent_insensitive)
    # (term, broadcast) -> sorted midpoints, and which of them are taken
    mids: dict[tuple[str, str], list[float]] = defaultdict(list)
    for term, occs in occurrences.items():
        for broadcast, start, end in occs:
            mids[(term, broadcast)].append((start + end) / 2.0)
    for values in mids.values():
        values.sort()
    taken = {pair: [False] * len(values) for pair, values in mids.items()}
    correct = [False] * len(hits)
    if not hits:
        return correct
    reach = tolerance + _EPS
    for i in _ranking(hits, key):
        hit = hits[i]
        pair = (norm(hit.term), hit.broadcast)
        values = mids.get(pair)
        if not values:
            continue
        mid = (float(hit.start) + float(hit.end)) / 2.0
        lo, hi = bisect_left(values, mid - reach), bisect_right(values, mid + reach)
        free = [j for j in range(lo, hi) if not taken[pair][j]]
        if free:
            j = min(free, key=lambda j: abs(values[j] - mid))
            taken[pair][j] = True
            correct[i] = True
    return correct


# --------------------------------------------------------------------------
# Term-weighted value


@dataclass(frozen=True)
class TermResult:
    """Counts and error rates of one term at one threshold."""

    term: str  # normalised type
    n_true: int  # reference occurrences
    n_correct: int  # correct hits at or above the threshold
    n_false_alarm: int  # other hits at or above the threshold
    p_miss: float  # 1 - n_correct / n_true (NaN when n_true == 0)
    p_false_alarm: float  # n_false_alarm / (T - n_true)
    value: float  # 1 - (p_miss + beta * p_false_alarm); NaN when n_true == 0


def _prepare(hits, reference, terms, tolerance, key, accent_insensitive):
    """Normalised terms, their occurrence counts, and the evaluated hits."""
    norm = _normaliser(accent_insensitive)
    term_list = sorted({norm(t) for t in terms})
    occurrences = reference_occurrences(reference, term_list, accent_insensitive)
    n_true = {t: len(occurrences[t]) for t in term_list}
    hits = [h for h in hits if norm(h.term) in n_true]
    # Rebuild the reference as occurrences so that multi-word terms match too.
    occ_reference = [
        (b, s, e, t) for t, occs in occurrences.items() for (b, s, e) in occs
    ]
    correct = match_hits(hits, occ_reference, tolerance, key, accent_insensitive)
    return term_list, n_true, hits, correct, norm


def _check_duration(total_seconds: float, n_true: dict[str, int]) -> None:
    if not total_seconds > 0 or not math.isfinite(total_seconds):
        raise TrawlError(f"total duration of the searched audio must be positive, not {total_seconds}")
    biggest = max(n_true.values(), default=0)
    if biggest >= total_seconds:
        raise TrawlError(
            f"a term occurs {biggest} times in {total_seconds} s of audio: "
            "the false-alarm rate needs more seconds than occurrences"
        )


def term_breakdown(
    hits: Sequence[Any],
    reference: Iterable[Reference],
    terms: Iterable[str],
    total_seconds: float,
    threshold: float,
    beta: float = DEFAULT_BETA,
    tolerance: float = DEFAULT_TOLERANCE,
    key: Key = "score",
    accent_insensitive: bool = False,
) -> dict[str, TermResult]:
    """Per-term counts and rates, using hits whose ``key`` is >= ``threshold``.

    ``total_seconds`` is T, the duration of all searched audio, non-speech
    included: each second is one trial, so P_FA = N_FA / (T - N_true). Terms
    with no reference occurrence are listed with NaN rates and value.
    """
    term_list, n_true, hits, correct, norm = _prepare(
        hits, reference, terms, tolerance, key, accent_insensitive
    )
    _check_duration(total_seconds, n_true)
    get = _key_function(key)
    n_correct = dict.fromkeys(term_list, 0)
    n_fa = dict.fromkeys(term_list, 0)
    for hit, ok in zip(hits, correct):
        if float(get(hit)) >= threshold:
            t = norm(hit.term)
            if ok:
                n_correct[t] += 1
            else:
                n_fa[t] += 1
    out: dict[str, TermResult] = {}
    for t in term_list:
        nt = n_true[t]
        p_fa = n_fa[t] / (total_seconds - nt)
        p_miss = 1.0 - n_correct[t] / nt if nt else math.nan
        value = 1.0 - (p_miss + beta * p_fa) if nt else math.nan
        out[t] = TermResult(t, nt, n_correct[t], n_fa[t], p_miss, p_fa, value)
    return out


def _mean_value(results: dict[str, TermResult]) -> float:
    values = [r.value for r in results.values() if r.n_true > 0]
    if not values:
        raise TrawlError("none of the terms occurs in the reference: TWV is undefined")
    return float(np.mean(values))


def atwv(
    hits: Sequence[Any],
    reference: Iterable[Reference],
    terms: Iterable[str],
    total_seconds: float,
    threshold: float,
    beta: float = DEFAULT_BETA,
    tolerance: float = DEFAULT_TOLERANCE,
    key: Key = "score",
    accent_insensitive: bool = False,
) -> float:
    """Actual term-weighted value at ``threshold`` (hits with key >= threshold).

    TWV = 1 - mean over terms of (P_miss + beta * P_FA), NIST 2006 STD
    evaluation plan. Terms with no reference occurrence are excluded from the
    mean (P_miss is undefined for them); hits of terms not in ``terms`` are
    ignored. A TrawlError when no term occurs in the reference.
    """
    results = term_breakdown(
        hits, reference, terms, total_seconds, threshold, beta, tolerance, key, accent_insensitive
    )
    return _mean_value(results)


def mtwv(
    hits: Sequence[Any],
    reference: Iterable[Reference],
    terms: Iterable[str],
    total_seconds: float,
    beta: float = DEFAULT_BETA,
    tolerance: float = DEFAULT_TOLERANCE,
    key: Key = "score",
    accent_insensitive: bool = False,
) -> tuple[float, float]:
    """Maximum term-weighted value over all thresholds, and that threshold.

    Each distinct hit score is a candidate threshold, and so is +inf (no hit
    accepted, TWV = 0). Among equal values the highest threshold is returned.
    One sort and one matching: accepting a correct hit of term t adds
    1/(K * N_true(t)) to TWV, a false alarm subtracts
    beta / (K * (T - N_true(t))), with K the number of terms that occur.
    Terms with no reference occurrence are excluded, as in ``atwv``.
    """
    term_list, n_true, hits, correct, norm = _prepare(
        hits, reference, terms, tolerance, key, accent_insensitive
    )
    _check_duration(total_seconds, n_true)
    k = sum(1 for t in term_list if n_true[t] > 0)
    if k == 0:
        raise TrawlError("none of the terms occurs in the reference: TWV is undefined")
    counted = [(h, ok) for h, ok in zip(hits, correct) if n_true[norm(h.term)] > 0]
    if not counted:
        return 0.0, math.inf
    get = _key_function(key)
    values = np.array([float(get(h)) for h, _ in counted])
    gains = np.array(
        [
            1.0 / n_true[norm(h.term)] if ok else -beta / (total_seconds - n_true[norm(h.term)])
            for h, ok in counted
        ]
    ) / k
    return _best_threshold(values, gains)


def _best_threshold(values: np.ndarray, gains: np.ndarray) -> tuple[float, float]:
    """Max over thresholds of the summed gains of the items scoring at or above it (0 at +inf),
    and that threshold (the highest among equal values)."""
    if not len(values):
        return 0.0, math.inf
    order = np.argsort(-values, kind="mergesort")
    values, gains = values[order], gains[order]
    last = np.r_[np.nonzero(np.diff(values))[0], values.size - 1]
    twv = np.cumsum(gains)[last]
    best = int(np.argmax(twv))  # first maximum = highest threshold
    if twv[best] <= 0.0:
        return 0.0, math.inf
    return float(twv[best]), float(values[last[best]])


def sampled_mtwv(
    terms: Sequence[tuple[Sequence[float], Sequence[float], Sequence[float]]],
    total_seconds: float,
    beta: float = DEFAULT_BETA,
) -> tuple[float, float]:
    """MTWV estimated from a checked sample, one global threshold over every term's scores.

    Per term: (scores of its confirmed hits, scores of the other checked hits, scores of a
    random sample of archive windows). As in ``mtwv`` (NIST 2006: one non-target trial per
    second, T - N_true of them), except that what a checked sample cannot count is estimated:
    the confirmed hits stand for all of the term's occurrences (N_true = their number, a lower
    bound: occurrences the search never offered are not known), and the archive's false alarms
    are estimated from the window sample, each sampled window standing for one second of the
    archive, so P_FA = (sampled windows >= threshold) / (sample size) + (other checked hits
    >= threshold) / (T - N_true). Terms without a confirmed hit are left out.
    """
    if total_seconds <= 0:
        raise TrawlError(f"total duration must be positive, not {total_seconds}")
    used = [(np.asarray(p, float), np.asarray(o, float), np.asarray(b, float)) for p, o, b in terms if len(p)]
    if not used:
        return 0.0, math.inf
    k = len(used)
    values, gains = [], []
    for pos, other, bg in used:
        n = len(pos)
        values += [pos, other, bg]
        gains += [np.full(n, 1.0 / (k * n)), np.full(len(other), -beta / (k * max(total_seconds - n, 1.0))),
                  np.full(len(bg), -beta / (k * max(len(bg), 1)))]
    return _best_threshold(np.concatenate(values), np.concatenate(gains))


# --------------------------------------------------------------------------
# Ranked-list measures


def _top_k_correct(hits, reference, terms, k, tolerance, key, accent_insensitive):
    """Per term: reference occurrence count and correct hits among its top k."""
    if k < 1:
        raise ValueError(f"k must be at least 1, not {k}")
    hits = list(hits)
    if terms is None:
        terms = {h.term for h in hits}
    term_list, n_true, hits, correct, norm = _prepare(
        hits, reference, terms, tolerance, key, accent_insensitive
    )
    seen = dict.fromkeys(term_list, 0)
    in_top = dict.fromkeys(term_list, 0)
    if hits:
        for i in _ranking(hits, key):
            t = norm(hits[i].term)
            if seen[t] < k:
                seen[t] += 1
                in_top[t] += int(correct[i])
    return n_true, in_top


def precision_at_k(
    hits: Sequence[Any],
    reference: Iterable[Reference],
    k: int = 10,
    terms: Iterable[str] | None = None,
    tolerance: float = DEFAULT_TOLERANCE,
    key: Key = "score",
    accent_insensitive: bool = False,
) -> float:
    """Mean over terms of (correct hits among the term's top k) / k.

    The mean runs over the terms (``terms``, default: the terms of the hits)
    that occur at least once in the reference. A term's top k are its k
    highest-ranked hits (ties: input order); a term with fewer than k hits
    still divides by k, as trec_eval's P@k does (common practice).
    """
    n_true, in_top = _top_k_correct(hits, reference, terms, k, tolerance, key, accent_insensitive)
    counted = [in_top[t] / k for t in n_true if n_true[t] > 0]
    if not counted:
        raise TrawlError("none of the terms occurs in the reference: precision@k is undefined")
    return float(np.mean(counted))


def recall_at_k(
    hits: Sequence[Any],
    reference: Iterable[Reference],
    k: int = 100,
    terms: Iterable[str] | None = None,
    tolerance: float = DEFAULT_TOLERANCE,
    key: Key = "score",
    accent_insensitive: bool = False,
) -> float:
    """Pooled recall: correct hits among each term's top k, summed over terms,
    divided by the reference occurrences of all those terms (``terms``,
    default: the terms of the hits)."""
    n_true, in_top = _top_k_correct(hits, reference, terms, k, tolerance, key, accent_insensitive)
    total = sum(n_true.values())
    if total == 0:
        raise TrawlError("none of the terms occurs in the reference: recall@k is undefined")
    return sum(in_top.values()) / total


# --------------------------------------------------------------------------
# Reading reference timings

_REFERENCE_COLUMNS = ("broadcast", "start", "end", "word")


def read_reference(path: str | Path) -> list[Reference]:
    """Reference word timings from a TSV or CSV file with a header row.

    Columns ``broadcast, start, end, word`` (any order, case-insensitive,
    others ignored). Tab-separated when the header line holds a tab, else
    comma-separated. UTF-8, with or without a byte-order mark. Blank lines
    are skipped; a bad row raises a TrawlError naming its line.
    """
    path = Path(path)
    try:
        text = path.read_bytes().decode("utf-8-sig")
    except OSError as exc:
        raise TrawlError(f"cannot read the reference {path}: {exc.strerror}") from exc
    except UnicodeDecodeError as exc:
        raise TrawlError(f"the reference {path} is not UTF-8 (byte {exc.start})") from exc
    first_line = io.StringIO(text, newline=None).readline()
    delimiter = "\t" if "\t" in first_line else ","
    reader = csv.reader(io.StringIO(text, newline=""), delimiter=delimiter)
    header = next(reader, None)
    if header is None:
        raise TrawlError(f"the reference {path} is empty")
    names = [h.strip().lower() for h in header]
    missing = [c for c in _REFERENCE_COLUMNS if c not in names]
    if missing:
        raise TrawlError(
            f"the reference {path} lacks the column(s) {', '.join(missing)} in its header line"
        )
    col = {c: names.index(c) for c in _REFERENCE_COLUMNS}
    out: list[Reference] = []
    line = reader.line_num + 1
    for row in reader:
        row_line, line = line, reader.line_num + 1
        if not any(cell.strip() for cell in row):
            continue
        if len(row) < len(header):
            raise TrawlError(
                f"{path}, line {row_line}: {len(row)} fields where the header has {len(header)}"
            )
        broadcast = row[col["broadcast"]].strip().replace("\\", "/")
        word = row[col["word"]].strip()
        if not broadcast or not word:
            raise TrawlError(f"{path}, line {row_line}: empty broadcast or word")
        times = []
        for name in ("start", "end"):
            cell = row[col[name]].strip()
            try:
                value = float(cell)
            except ValueError:
                raise TrawlError(f"{path}, line {row_line}: {name} {cell!r} is not a number") from None
            if not math.isfinite(value) or value < 0:
                raise TrawlError(f"{path}, line {row_line}: {name} {cell!r} is not a time in seconds")
            times.append(value)
        if times[1] < times[0]:
            raise TrawlError(f"{path}, line {row_line}: end {times[1]} is before start {times[0]}")
        out.append((broadcast, times[0], times[1], word))
    return out
