"""Calibration benchmark: does a calibration fitted on some terms' checked hits hold for other terms?

Reads the radio-condition hits of bench_search.py (runs/bench_search_hits.json, with verdicts
from the reference). Each term's top `--per-term` hits form the "checked sample". The terms
are split into two halves (seeded); the calibration is fitted on half A (`fit_calibration`,
target precision 0.9) and measured on half B: expected calibration error, Brier score, the
precision realised at the chosen threshold, and whether the 95% Wilson interval that the
tool reports for precision (from A's out-of-fold predictions) covers the precision realised
on B. B's own Wilson interval is given too, with whether it reaches the target. Then the
halves are swapped, for several seeds; the mean closes the table.

    python tests/benchmarks/bench_calibration.py [--hits FILE] [--per-term 40] [--seeds 5]

Prints a table and a final JSON line (also written to runs/bench_calibration.json).
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from detector import TrawlError  # noqa: E402
from detector.calibration import (brier_score, expected_calibration_error, fit_calibration,  # noqa: E402
                                  hit_features, wilson_interval)

sys.path.insert(0, str(Path(__file__).resolve().parent))
from bench_search import jsonable  # noqa: E402


def checked_sample(hits: list[dict], per_term: int) -> dict[str, list[dict]]:
    """Each term's `per_term` best-ranked hits."""
    by_term: dict[str, list[dict]] = {}
    for h in sorted(hits, key=lambda h: (h["term"], h["rank"])):
        rows = by_term.setdefault(h["term"], [])
        if len(rows) < per_term:
            rows.append(h)
    return by_term


def arrays(rows: list[dict]):
    X = hit_features([h["score"] for h in rows], [h["raw"] for h in rows], [h["letters"] for h in rows])
    y = np.array([1.0 if h["correct"] else 0.0 for h in rows])
    return X, y, [h["term"] for h in rows], np.array([h["confidence"] for h in rows])


def covers(interval, value) -> bool | None:
    return None if value is None else bool(interval[0] <= value <= interval[1])


def one_run(fit_rows: list[dict], test_rows: list[dict], target: float, total_seconds: float) -> dict:
    Xa, ya, ta, _ = arrays(fit_rows)
    Xb, yb, tb, uncal_b = arrays(test_rows)
    out = {"fit_terms": len(set(ta)), "fit_hits": len(ya), "fit_correct": int(ya.sum()),
           "test_terms": len(set(tb)), "test_hits": len(yb), "test_correct": int(yb.sum())}
    try:
        cal = fit_calibration(Xa, ya, ta, target_precision=target, total_seconds=total_seconds)
    except TrawlError as e:
        return {**out, "error": str(e)}
    p = cal.confidence(Xb)
    accepted = p >= cal.threshold
    n_acc, k_acc = int(accepted.sum()), int(yb[accepted].sum())
    realised = k_acc / n_acc if n_acc else None
    a_ci = tuple(cal.report["precision_ci"])
    b_ci = wilson_interval(k_acc, n_acc)
    return {**out, "method": cal.method, "threshold": cal.threshold,
            "a_oof_precision": cal.report["precision"], "a_oof_accepted": cal.report["accepted"],
            "a_oof_ci": list(a_ci), "a_oof_ece": cal.report["ece"], "a_oof_brier": cal.report["brier"],
            "ece": expected_calibration_error(p, yb), "brier": brier_score(p, yb),
            "uncalibrated_ece": expected_calibration_error(uncal_b, yb),
            "accepted": n_acc, "precision": realised, "a_ci_covers_realised": covers(a_ci, realised),
            "b_ci": list(b_ci), "b_ci_reaches_target": bool(b_ci[1] >= target) if n_acc else None}


def mean_of(runs: list[dict], key: str) -> float | None:
    vals = [float(r[key]) for r in runs if r.get(key) is not None]
    return float(np.mean(vals)) if vals else None


def fmt(v, spec=".3f") -> str:
    if v is None:
        return "-"
    if isinstance(v, bool):
        return "yes" if v else "no"
    return format(v, spec)


def ci(v) -> str:
    return "-" if v is None else f"[{v[0]:.2f},{v[1]:.2f}]"


def print_table(runs: list[dict], summary: dict) -> None:
    head = (f"{'seed':>4} {'fit':>3} {'A hits/ok':>10} {'B hits/ok':>10} {'method':>8} {'thresh':>6} {'ECE B':>6} "
            f"{'uncal':>6} {'Brier B':>7} {'acc B':>5} {'prec B':>6} {'A oof CI':>13} {'covers':>6} {'B CI':>13} {'B>=tgt':>6}")
    print(head)
    print("(thresh '-': no threshold reached the target on A, nothing accepted)")
    for r in runs:
        left = f"{r['seed']:>4} {r['fit']:>3} {r['fit_hits']:>5}/{r['fit_correct']:<4} {r['test_hits']:>5}/{r['test_correct']:<4}"
        if "error" in r:
            print(f"{left} not fitted: {r['error']}")
            continue
        print(f"{left} {r['method']:>8} {fmt(r['threshold'] if r['threshold'] <= 1 else None):>6} {fmt(r['ece']):>6} {fmt(r['uncalibrated_ece']):>6} "
              f"{fmt(r['brier']):>7} {r['accepted']:>5} {fmt(r['precision']):>6} {ci(r['a_oof_ci']):>13} "
              f"{fmt(r['a_ci_covers_realised']):>6} {ci(r['b_ci']):>13} {fmt(r['b_ci_reaches_target']):>6}")
    s = summary
    print(f"mean over {s['fitted_runs']} fitted runs of {s['runs']}: ECE {fmt(s['ece'])} (uncalibrated {fmt(s['uncalibrated_ece'])}), "
          f"Brier {fmt(s['brier'])}, realised precision {fmt(s['precision'])} over {s['runs_accepting']} runs accepting hits "
          f"(target {s['target_precision']}), accepted per run {fmt(s['accepted'], '.1f')}; "
          f"A's interval covered B's precision in {s['a_ci_covered']}/{s['runs_accepting']} runs, "
          f"B's interval reached the target in {s['b_ci_reached_target']}/{s['runs_accepting']}")


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--hits", type=Path, default=ROOT / "runs" / "bench_search_hits.json")
    ap.add_argument("--per-term", type=int, default=40, help="checked hits per term (its best-ranked ones)")
    ap.add_argument("--seeds", type=int, default=5)
    ap.add_argument("--target", type=float, default=0.9, help="target precision")
    a = ap.parse_args(argv)
    if not a.hits.exists():
        sys.exit(f"{a.hits} is missing: run tests/benchmarks/bench_search.py first")
    data = json.loads(a.hits.read_text(encoding="utf-8"))
    sample = checked_sample(data["hits"], a.per_term)
    terms = sorted(sample)
    runs = []
    for seed in range(a.seeds):
        order = [terms[i] for i in np.random.default_rng(seed).permutation(len(terms))]
        halves = (order[: len(order) // 2], order[len(order) // 2 :])
        for fit, (fit_terms, test_terms) in (("A", halves), ("B", halves[::-1])):
            fit_rows = [h for t in fit_terms for h in sample[t]]
            test_rows = [h for t in test_terms for h in sample[t]]
            runs.append({"seed": seed, "fit": fit, **one_run(fit_rows, test_rows, a.target, data["total_seconds"])})
    fitted = [r for r in runs if "error" not in r]
    accepting = [r for r in fitted if r["accepted"]]
    summary = {"runs": len(runs), "fitted_runs": len(fitted), "runs_accepting": len(accepting),
               "target_precision": a.target, "per_term": a.per_term, "terms": len(terms),
               "sample_hits": sum(len(v) for v in sample.values()),
               "sample_correct": sum(h["correct"] for v in sample.values() for h in v),
               **{k: mean_of(fitted, k) for k in ("ece", "uncalibrated_ece", "brier", "accepted", "a_oof_ece")},
               "precision": mean_of(accepting, "precision"),
               "a_ci_covered": sum(bool(r["a_ci_covers_realised"]) for r in accepting),
               "b_ci_reached_target": sum(bool(r["b_ci_reaches_target"]) for r in accepting)}
    print(f"{summary['terms']} terms, {summary['sample_hits']} checked hits ({summary['sample_correct']} correct), "
          f"condition {data.get('condition')}, {data['total_seconds'] / 60:.1f} min searched")
    print_table(runs, summary)
    res = jsonable({"hits_file": str(a.hits), "summary": summary, "runs": runs})
    line = json.dumps(res, ensure_ascii=False)
    (ROOT / "runs" / "bench_calibration.json").write_text(line + "\n", encoding="utf-8")
    print(line)


if __name__ == "__main__":
    main()
