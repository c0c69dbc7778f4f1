"""Evaluating search on transcribed broadcasts: MTWV/ATWV, P@10, recall in the top 100."""

from __future__ import annotations

import math
from pathlib import Path

from . import TrawlError
from .evaluation import atwv, mtwv, precision_at_k, read_reference, recall_at_k, term_breakdown
from .search import Searcher

CANDIDATES_PER_TERM = 400


def evaluate_hits(hits, reference, terms, total_seconds: float, threshold: float, key="score") -> dict:
    """All measures for a set of hits (scored by `key`, accepted at `threshold`)."""
    best, best_t = mtwv(hits, reference, terms, total_seconds, key=key)
    per = term_breakdown(hits, reference, terms, total_seconds, threshold, key=key)
    by_term: dict[str, list] = {}
    for h in hits:
        by_term.setdefault(h.term, []).append(h)
    per_term = {}
    for t, r in per.items():
        th = by_term.get(t, [])
        occurs = r.n_true > 0
        per_term[t] = {
            "occurrences": r.n_true,
            "twv": None if not occurs or math.isnan(r.value) else r.value,
            "false_alarms": r.n_false_alarm,
            "p_at_10": precision_at_k(th, reference, 10, [t], key=key) if occurs and th else 0.0,
            "recall_at_100": recall_at_k(th, reference, 100, [t], key=key) if occurs and th else 0.0,
        }
    return {
        "mtwv": best, "mtwv_threshold": best_t,
        "atwv": atwv(hits, reference, terms, total_seconds, threshold, key=key), "threshold": threshold,
        "p_at_10": precision_at_k(hits, reference, 10, terms, key=key),
        "recall_at_100": recall_at_k(hits, reference, 100, terms, key=key),
        "occurrences": sum(v["occurrences"] for v in per_term.values()),
        "searched_hours": total_seconds / 3600, "per_term": per_term,
    }


def evaluate(index_dir: Path, reference_path: Path, terms: list[str], models_dir: str | None = None) -> dict:
    s = Searcher(index_dir, models_dir)
    reference = read_reference(reference_path)
    covered = {r[0] for r in reference}
    durations = {b["path"]: b["duration"] for b in s.index.broadcasts()}
    searched = covered & set(durations)
    if not searched:
        raise TrawlError(f"none of the broadcasts in {reference_path} is in the index")
    total = sum(durations[b] for b in searched)
    from .spelling import check_term

    terms = [check_term(t) for t in terms]
    hits = []
    for t in terms:
        hits += [h for h in s.search(t, top=CANDIDATES_PER_TERM) if h.broadcast in searched]
    if s.calibration is not None:
        res = evaluate_hits(hits, reference, terms, total, s.calibration.threshold, key="confidence")
    else:
        from .search import twv_margin  # uncalibrated: each term's TWV threshold (keyword-specific thresholding)

        res = evaluate_hits(hits, reference, terms, total, 0.0, key=twv_margin)
        res["ranked_by"] = "margin over the term's TWV threshold (log-odds)"
    res["broadcasts"] = len(searched)
    return res
