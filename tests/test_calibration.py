"""Tests of detector.calibration against scikit-learn, scipy and hand-worked examples."""

from __future__ import annotations

import json
import math
import xml.etree.ElementTree as ET

import numpy as np
import pytest
from scipy.optimize import brentq
from scipy.stats import norm

from detector import TrawlError
from detector.calibration import (
    Calibration,
    best_first_depth,
    best_first_sample,
    brier_score,
    expected_calibration_error,
    fit_calibration,
    fit_isotonic,
    fit_platt,
    hit_features,
    out_of_fold,
    precision_threshold,
    reliability_svg,
    suggest_sample,
    term_folds,
    term_thresholds,
    twv_threshold,
    wilson_interval,
)
from detector.hits import Hit



def LogisticRegression(**kw):
    """Reference library scikit-learn (the [test] extra); the tests that need it skip without it."""
    return pytest.importorskip("sklearn.linear_model").LogisticRegression(**kw)


def IsotonicRegression(**kw):
    return pytest.importorskip("sklearn.isotonic").IsotonicRegression(**kw)

def _sigmoid(z):
    return 1.0 / (1.0 + np.exp(-z))


def _synthetic(n_terms, per_term, seed):
    """Hits whose labels are drawn from a known logistic model of their features."""
    rng = np.random.default_rng(seed)
    letters = np.repeat(rng.integers(3, 11, size=n_terms), per_term)
    terms = np.repeat([f"term{i}" for i in range(n_terms)], per_term)
    score = rng.normal(0.0, 1.5, size=n_terms * per_term)
    raw = 0.5 + 0.1 * score + rng.normal(0.0, 0.05, size=score.shape)
    X = hit_features(score, raw, letters)
    true_w, true_b = np.array([2.0, 1.0, 0.5]), -1.5
    p = _sigmoid(X @ true_w + true_b)
    y = (rng.random(len(p)) < p).astype(int)
    return X, y, list(terms), p


# ---------------------------------------------------------------- Platt


@pytest.mark.parametrize("n,l2", [(150, 1e-2), (600, 1e-2), (400, 1e-3)])
def test_platt_matches_sklearn_logistic_regression(n, l2):
    rng = np.random.default_rng(n)
    X = rng.normal(size=(n, 3)) * [1.0, 0.3, 2.0] + [0.0, 0.5, 1.0]
    y = (rng.random(n) < _sigmoid(X @ [1.5, -2.0, 0.4] - 0.3)).astype(int)
    ours = fit_platt(X, y, l2=l2)
    # mean logloss + (l2/2)|w|^2  ==  (C*sum logloss + |w|^2/2) / (C*n)  with C = 1/(l2*n)
    ref = LogisticRegression(C=1.0 / (l2 * n), tol=1e-12, max_iter=10_000).fit(X, y)
    np.testing.assert_allclose(ours.weights, ref.coef_[0], atol=1e-4)
    assert ours.intercept == pytest.approx(ref.intercept_[0], abs=1e-4)
    np.testing.assert_allclose(ours.predict(X), ref.predict_proba(X)[:, 1], atol=1e-5)


def test_platt_penalty_scales_with_sample_size():
    # The same data repeated 3 times with the same l2 equals sklearn with C = 1/(l2*3n):
    # a wrong correspondence (e.g. C = 1/l2) would fit different weights here.
    rng = np.random.default_rng(7)
    X = rng.normal(size=(60, 2))
    y = (rng.random(60) < _sigmoid(2 * X[:, 0])).astype(int)
    X3, y3 = np.vstack([X] * 3), np.concatenate([y] * 3)
    ours = fit_platt(X3, y3, l2=0.05)
    ref = LogisticRegression(C=1.0 / (0.05 * 180), tol=1e-12, max_iter=10_000).fit(X3, y3)
    np.testing.assert_allclose(ours.weights, ref.coef_[0], atol=1e-4)
    wrong = LogisticRegression(C=1.0 / 0.05, tol=1e-12, max_iter=10_000).fit(X3, y3)
    assert np.max(np.abs(ours.weights - wrong.coef_[0])) > 1e-2


# ---------------------------------------------------------------- isotonic


def test_isotonic_matches_sklearn_with_ties_and_clipping():
    rng = np.random.default_rng(3)
    x = np.round(rng.normal(size=200), 1)  # many ties
    y = (rng.random(200) < _sigmoid(1.5 * x)).astype(float)
    ours = fit_isotonic(x, y)
    ref = IsotonicRegression(out_of_bounds="clip").fit(x, y)
    grid = np.concatenate([x, np.linspace(x.min() - 2, x.max() + 2, 301)])  # includes outside the range
    np.testing.assert_allclose(ours.predict(grid), ref.predict(grid), atol=1e-12)


def test_isotonic_matches_sklearn_on_decreasing_real_targets():
    # Targets against the order force pooling everywhere; ties at x=2.
    x = np.array([0.0, 1.0, 2.0, 2.0, 3.0, 4.0, 5.0])
    y = np.array([0.9, 0.7, 0.8, 0.1, 0.6, 0.2, 1.0])
    ours = fit_isotonic(x, y)
    ref = IsotonicRegression(out_of_bounds="clip").fit(x, y)
    grid = np.linspace(-1, 6, 71)
    np.testing.assert_allclose(ours.predict(grid), ref.predict(grid), atol=1e-12)


# ---------------------------------------------------------------- Wilson


def _wilson_by_score_test_inversion(k, n, level=0.95):
    """Interval endpoints as roots of (p_hat - pi) / sqrt(pi(1-pi)/n) = +-z, found numerically."""
    z = norm.ppf(0.5 + level / 2)
    ph = k / n
    f = lambda pi, s: (ph - pi) / math.sqrt(pi * (1 - pi) / n) - s * z  # noqa: E731
    lo = 0.0 if k == 0 else brentq(f, 1e-12, ph, args=(1,), xtol=1e-14)
    hi = 1.0 if k == n else brentq(f, max(ph, 1e-12), 1 - 1e-12, args=(-1,), xtol=1e-14)
    return lo, hi


@pytest.mark.parametrize(
    "k,n,published",
    [
        # Newcombe (1998), Statistics in Medicine 17:857-872, "Two-sided confidence
        # intervals for the single proportion", Table I, Wilson score method (from memory).
        (81, 263, (0.2553, 0.3662)),
        (0, 20, (0.0, 0.1611)),
    ],
)
def test_wilson_interval_published_and_independent(k, n, published):
    lo, hi = wilson_interval(k, n)
    assert (round(lo, 4), round(hi, 4)) == published
    ref_lo, ref_hi = _wilson_by_score_test_inversion(k, n)
    exact_lo, exact_hi = wilson_interval(k, n, z=norm.ppf(0.975))  # same z as the reference
    assert exact_lo == pytest.approx(ref_lo, abs=1e-10)
    assert exact_hi == pytest.approx(ref_hi, abs=1e-10)
    assert lo == pytest.approx(ref_lo, abs=1e-7)  # default z = 1.959964 is rounded


def test_wilson_interval_of_nothing_is_uninformative():
    assert wilson_interval(0, 0) == (0.0, 1.0)


# ---------------------------------------------------------------- ECE, Brier, thresholds


def test_ece_and_brier_hand_worked():
    p = np.array([0.05, 0.15, 0.15, 0.62, 0.68, 0.95])
    y = np.array([0, 0, 1, 1, 0, 1])
    # bins of width 0.1, weight = share of hits:
    #   [0.0,0.1): {0.05}       mean p 0.05, correct 0/1 -> |0 - 0.05|   = 0.05, weight 1/6
    #   [0.1,0.2): {0.15,0.15}  mean p 0.15, correct 1/2 -> |0.5 - 0.15| = 0.35, weight 2/6
    #   [0.6,0.7): {0.62,0.68}  mean p 0.65, correct 1/2 -> |0.5 - 0.65| = 0.15, weight 2/6
    #   [0.9,1.0]: {0.95}       mean p 0.95, correct 1/1 -> 0.05, weight 1/6
    #   ECE = (0.05 + 2*0.35 + 2*0.15 + 0.05) / 6 = 1.1 / 6
    assert expected_calibration_error(p, y) == pytest.approx(1.1 / 6, abs=1e-12)
    # Brier: (0.05^2 + 0.15^2 + 0.85^2 + 0.38^2 + 0.68^2 + 0.05^2) / 6
    #      = (0.0025 + 0.0225 + 0.7225 + 0.1444 + 0.4624 + 0.0025) / 6 = 1.3568 / 6
    assert brier_score(p, y) == pytest.approx(1.3568 / 6, abs=1e-12)


def test_ece_bin_edges_hand_worked():
    # 0.1 opens the second bin: (|0 - 0.05| + |1 - 0.1|) / 2 = 0.475
    # (were both in one bin it would be |0.5 - 0.075| = 0.425).  1.0 falls in the last bin.
    assert expected_calibration_error([0.05, 0.1], [0, 1]) == pytest.approx(0.475)
    assert expected_calibration_error([1.0, 1.0], [1, 1]) == pytest.approx(0.0)


def test_precision_threshold_hand_worked():
    p = [0.9, 0.8, 0.8, 0.7, 0.6]
    y = [1, 1, 0, 1, 0]
    # accepted at t=0.9: 1/1; t=0.8: 2/3; t=0.7: 3/4; t=0.6: 3/5.
    assert precision_threshold(p, y, 0.75) == (0.7, True)  # lowest t with precision >= 0.75
    assert precision_threshold(p, y, 0.99) == (0.9, True)
    t, met = precision_threshold([0.9, 0.5], [0, 1], 0.9)  # top hit wrong: 0/1, then 1/2
    assert not met and t > 1.0


def test_twv_threshold_hand_worked():
    # beta*N / (T + (beta-1)*N) = 999.9*2 / (3600 + 998.9*2) = 1999.8 / 5597.8
    assert twv_threshold(2.0, 3600.0) == pytest.approx(1999.8 / 5597.8, rel=1e-12)
    per = term_thresholds([0.5, 0.25, 0.9], ["a", "a", "b"], 1800.0)
    assert per["a"]["n_true"] == pytest.approx(0.75)
    assert per["a"]["threshold"] == pytest.approx(999.9 * 0.75 / (1800 + 998.9 * 0.75))
    assert per["b"]["threshold"] == pytest.approx(999.9 * 0.9 / (1800 + 998.9 * 0.9))
    with pytest.raises(TrawlError):
        twv_threshold(1.0, 0.0)


# ---------------------------------------------------------------- grouped cross-validation


def test_grouped_folds_never_split_a_term():
    terms = ["a"] * 7 + ["b"] * 3 + ["c"] * 5 + ["d"] * 1 + ["e"] * 4 + ["f"] * 6 + ["a"] * 2
    fold = term_folds(terms, folds=3)
    for t in set(terms):
        assert len({int(f) for f, u in zip(fold, terms) if u == t}) == 1
    assert set(fold.tolist()) == {0, 1, 2}
    assert set(term_folds(["x", "y", "x"], folds=5).tolist()) == {0, 1}  # at most one fold per term


def test_out_of_fold_predictions_come_from_other_terms_only():
    X, y, terms, _ = _synthetic(n_terms=6, per_term=40, seed=11)
    l2 = 1e-3
    oof = out_of_fold(X, y, terms, folds=3, l2=l2)
    fold = oof["fold"]
    for f in range(3):
        test, train = fold == f, fold != f
        assert not set(np.array(terms)[test]) & set(np.array(terms)[train])
        ref = LogisticRegression(C=1.0 / (l2 * train.sum()), tol=1e-12, max_iter=10_000).fit(X[train], y[train])
        np.testing.assert_allclose(oof["platt"][test], ref.predict_proba(X[test])[:, 1], atol=1e-5)
        iso = IsotonicRegression(out_of_bounds="clip").fit(ref.decision_function(X[train]), y[train])
        want = np.clip(iso.predict(ref.decision_function(X[test])), 1e-3, 1 - 1e-3)
        np.testing.assert_allclose(oof["isotonic"][test], want, atol=1e-4)


# ---------------------------------------------------------------- refusals


@pytest.mark.parametrize(
    "X,y,terms,words",
    [
        (np.zeros((0, 3)), [], [], "empty"),
        (np.ones((4, 3)), [1, 1, 1, 1], ["a", "a", "b", "b"], "yes"),
        (np.ones((4, 3)), [0, 0, 0, 0], ["a", "a", "b", "b"], "no"),
        (np.arange(12.0).reshape(4, 3), [1, 0, 1, 0], ["a"] * 4, "one term"),
        (np.array([[0.1, 0.2, np.nan], [0.3, 0.4, 1.0]]), [1, 0], ["a", "b"], "missing"),
        (np.array([[0.1, np.inf, 1.0], [0.3, 0.4, 1.0]]), [1, 0], ["a", "b"], "infinite"),
        (np.ones((3, 3)), [1, 0], ["a", "b", "c"], "one verdict"),
        (np.ones((2, 3)), [1, 2], ["a", "b"], "must be yes"),
    ],
)
def test_malformed_samples_are_refused_in_plain_words(X, y, terms, words):
    with pytest.raises(TrawlError, match=words):
        fit_calibration(X, y, terms)


# ---------------------------------------------------------------- the record


def _stepwise(seed):
    """Labels from a step-shaped (not logistic) probability of the score, where isotonic should fit better."""
    rng = np.random.default_rng(seed)
    n = 1200
    score = rng.uniform(-3, 3, size=n)
    p = np.where(score < -1, 0.05, np.where(score < 1.5, 0.5, 0.97))
    y = (rng.random(n) < p).astype(int)
    terms = [f"t{i % 8}" for i in range(n)]
    X = hit_features(score, 0.5 + 0.05 * score, np.full(n, 5))
    return X, y, terms


@pytest.mark.parametrize("case", ["logistic", "step"])
def test_method_is_the_better_held_out_likelihood_and_round_trips(case):
    if case == "logistic":
        X, y, terms, _ = _synthetic(n_terms=8, per_term=60, seed=5)
    else:
        X, y, terms = _stepwise(seed=5)
    cal = fit_calibration(X, y, terms, total_seconds=7200.0)
    ll = cal.report["method_log_likelihood"]
    assert cal.method == ("isotonic" if ll["isotonic"] > ll["platt"] else "platt")
    if case == "step":
        assert cal.method == "isotonic"
    text = json.dumps(cal.to_dict())
    back = Calibration.from_dict(json.loads(text))
    np.testing.assert_array_equal(back.confidence(X), cal.confidence(X))
    assert back.threshold == cal.threshold and back.version == cal.version
    assert back.sample_hash == cal.sample_hash and len(cal.sample_hash) == 64
    assert set(cal.twv["per_term"]) == set(terms)


def test_from_dict_refuses_other_versions():
    X, y, terms, _ = _synthetic(n_terms=4, per_term=30, seed=2)
    d = fit_calibration(X, y, terms).to_dict()
    d["version"] = 99
    with pytest.raises(TrawlError, match="version"):
        Calibration.from_dict(d)


def test_well_specified_case_is_calibrated_and_meets_target_precision():
    X, y, terms, _ = _synthetic(n_terms=20, per_term=100, seed=1)
    cal = fit_calibration(X, y, terms, target_precision=0.9)
    assert cal.method in ("platt", "isotonic")
    assert cal.report["ece"] < 0.04  # held-out ECE; 2000 hits, 10 bins
    assert not [w for w in cal.report["warnings"] if "Only" in w]
    # fresh hits from the same generator: the true precision above the threshold
    Xf, _, _, pf = _synthetic(n_terms=200, per_term=100, seed=99)
    conf = cal.confidence(Xf)
    assert np.mean(np.abs(conf - pf)) < 0.03
    accepted = conf >= cal.threshold
    assert accepted.sum() > 1000
    assert np.mean(pf[accepted]) == pytest.approx(0.9, abs=0.03)


def test_small_sample_draws_warnings():
    X, y, terms, _ = _synthetic(n_terms=3, per_term=15, seed=4)
    rep = fit_calibration(X, y, terms).report
    text = " ".join(rep["warnings"])
    assert "terms were checked" in text and "correct" in text and "wrong" in text


# ---------------------------------------------------------------- diagram and sample


def test_reliability_svg_is_valid_xml(tmp_path):
    X, y, terms, _ = _synthetic(n_terms=4, per_term=50, seed=8)
    p = _sigmoid(X @ [2.0, 1.0, 0.5] - 1.5)
    path = tmp_path / "plots" / "reliability.svg"
    reliability_svg(p, y, path, title="A & B <test>")
    root = ET.parse(path).getroot()
    assert root.tag.endswith("svg")
    texts = [t.text for t in root.iter() if t.tag.endswith("text")]
    # one count label per non-empty bin; they add up to the number of hits
    counts = np.bincount(np.minimum((p * 10).astype(int), 9), minlength=10)
    labels = [int(t) for t in texts if t and t.isdigit()]
    assert sorted(labels) == sorted(int(c) for c in counts if c)
    assert any("A & B <test>" in (t or "") for t in texts)
    assert [f.name for f in path.parent.iterdir()] == ["reliability.svg"]


def _hits(n_terms=5, per_term=40, seed=0):
    rng = np.random.default_rng(seed)
    return [
        Hit(term=f"w{t}", broadcast="a.opus", start=float(i), end=float(i) + 0.5, score=float(rng.normal()), confidence=0.5)
        for t in range(n_terms)
        for i in range(per_term)
    ]


def test_suggest_sample_spreads_over_terms_and_score_ranges():
    hits = _hits()
    pick = suggest_sample(hits, 20, seed=3)
    assert len(pick) == 20 and len({id(h) for h in pick}) == 20
    for t in {h.term for h in hits}:
        scores = np.sort([h.score for h in hits if h.term == t])
        mine = [h.score for h in pick if h.term == t]
        assert len(mine) == 4  # 20 picks dealt round-robin over 5 terms
        quartile = sorted(int(np.searchsorted(scores, s, side="right") - 1) // 10 for s in mine)
        assert quartile == [0, 1, 2, 3]  # one pick per score quartile of the term
    assert suggest_sample(hits, 20, seed=3) == pick
    assert suggest_sample(hits, 20, seed=4) != pick


def test_suggest_sample_small_and_large_n():
    hits = _hits(n_terms=3, per_term=4)
    assert len({h.term for h in suggest_sample(hits, 3)}) == 3
    assert len(suggest_sample(hits, 100)) == 12
    assert suggest_sample(hits, 0) == []


def test_best_first_sample_takes_every_terms_best_hits_before_any_later_ones():
    # Hand-worked: terms a (5 hits), b (1 hit), c (3 hits), best first, two per round. Round 1
    # deals a1 a2, b1, c1 c2; round 2 deals a3 a4, c3; round 3 a5.
    ranked = [["a1", "a2", "a3", "a4", "a5"], ["b1"], ["c1", "c2", "c3"]]
    assert best_first_sample(ranked, 3) == ["a1", "a2", "b1"]  # every term's best pair before any third hit
    assert best_first_sample(ranked, 6) == ["a1", "a2", "a3", "b1", "c1", "c2"]
    assert best_first_sample(ranked, 99) == [h for r in ranked for h in r]  # every hit, once
    assert best_first_sample(ranked, 4, per_round=1) == ["a1", "a2", "b1", "c1"]
    assert best_first_sample(ranked, 0) == [] and best_first_sample([], 3) == []


def test_best_first_depth_is_the_deepest_rank_the_sample_reaches():
    # Hand-worked: 10 picks over 3 terms in rounds of two: 6 in round 1, 4 in round 2 (ranks 3-4).
    assert best_first_depth(10, 3) == 4
    assert best_first_depth(6, 3) == 2 and best_first_depth(7, 3) == 4
    assert best_first_depth(1, 50) == 2  # one round at least
