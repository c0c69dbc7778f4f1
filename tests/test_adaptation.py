"""Query-side adaptation: identity without hits, gradient, held-out gain, refusals."""

from __future__ import annotations

import hashlib
import json

import numpy as np
import pytest

from detector import TrawlError
from detector.adaptation import (
    QueryMap,
    _objective,
    _sample,
    _term_targets,
    average_precision,
    fit_query_map,
)


def _unit(x: np.ndarray) -> np.ndarray:
    return x / np.linalg.norm(x, axis=-1, keepdims=True)


def checked_sample(seed: int, d: int = 12, n_terms: int = 24, per_term: int = 6, rotate: bool = True):
    """Checked hits where each term's query is a fixed rotation R of its audio, plus noise.

    Term t has an audio prototype p_t (random unit vector); its query is
    normalize(R p_t + noise). Even hits are confirmed (audio near p_t), odd hits are
    rejected (audio near a random term's prototype, usually another one).
    """
    rng = np.random.default_rng(seed)
    rot = np.linalg.qr(rng.normal(size=(d, d)))[0] if rotate else np.eye(d)
    protos = _unit(rng.normal(size=(n_terms, d)))
    q, a, y, terms = [], [], [], []
    for t in range(n_terms):
        query = _unit(rot @ protos[t] + 0.1 * rng.normal(size=d))
        for j in range(per_term):
            confirmed = j % 2 == 0
            src = protos[t] if confirmed else protos[rng.integers(n_terms)]
            a.append(_unit(src + 0.25 * rng.normal(size=d)))
            q.append(query)
            y.append(int(confirmed))
            terms.append(f"term{t}")
    return np.array(q), np.array(a), np.array(y), terms


@pytest.fixture(scope="module")
def rotated():
    return checked_sample(seed=7)


@pytest.fixture(scope="module")
def rotated_fit(rotated):
    return fit_query_map(*rotated, folds=4, seed=0)


# --- average precision -------------------------------------------------------------


def test_average_precision_hand_worked():
    # ranking: pos, neg, pos, neg -> precisions at the positives 1/1 and 2/3 -> (1 + 2/3) / 2
    assert average_precision(np.array([0.9, 0.8, 0.7, 0.6]), np.array([1, 0, 1, 0])) == pytest.approx(5 / 6)
    # order of the input does not matter, only the scores
    assert average_precision(np.array([0.6, 0.7, 0.8, 0.9]), np.array([0, 1, 0, 1])) == pytest.approx(5 / 6)
    # a tie is one step: precision after the tie (1/2) counts for the positive in it
    assert average_precision(np.array([0.5, 0.5]), np.array([1, 0])) == pytest.approx(0.5)
    # all positives ranked first
    assert average_precision(np.array([3.0, 2.0, 1.0]), np.array([1, 1, 0])) == 1.0


def test_average_precision_agrees_with_scikit_learn():
    metrics = pytest.importorskip("sklearn.metrics")
    rng = np.random.default_rng(3)
    for _ in range(5):
        scores = np.round(rng.normal(size=30), 1)  # rounding makes ties
        labels = rng.integers(0, 2, size=30)
        labels[0] = 1
        expected = metrics.average_precision_score(labels, scores)
        assert average_precision(scores, labels) == pytest.approx(expected)


# --- the map ----------------------------------------------------------------------


def test_no_checked_hits_gives_exactly_the_identity():
    qm, report = fit_query_map(np.zeros((0, 8)), np.zeros((0, 8)), [], [])
    assert np.array_equal(qm.matrix, np.eye(8))
    assert report["enabled"] is False and qm.enabled is False
    queries = _unit(np.random.default_rng(0).normal(size=(5, 8)))
    assert np.array_equal(qm.apply(queries), queries / np.linalg.norm(queries, axis=1, keepdims=True))


def test_identity_map_apply_normalises_rows_and_keeps_float32():
    qm = QueryMap.identity(3)
    x = np.array([[3.0, 0.0, 4.0], [0.0, 2.0, 0.0]], dtype=np.float32)
    out = qm.apply(x)
    assert out.dtype == np.float32
    assert np.array_equal(out, np.array([[0.6, 0.0, 0.8], [0.0, 1.0, 0.0]], dtype=np.float32))
    assert qm.apply(np.array([0.0, 0.0, 5.0])).tolist() == [0.0, 0.0, 1.0]
    with pytest.raises(TrawlError, match="3-dimensional"):
        qm.apply(np.ones((2, 4)))


def test_objective_gradient_matches_finite_differences():
    q, a, y, terms = checked_sample(seed=1, d=5, n_terms=4, per_term=4)
    s = _sample(q, a, y, terms)
    c = _term_targets(s)
    rng = np.random.default_rng(2)
    m = np.eye(5) + 0.3 * rng.normal(size=(5, 5))
    b = 0.1
    args = dict(lam=0.05, temperature=0.2, pull=0.7)
    _, g_m, g_b = _objective(m, b, s, c, **args)
    h = 1e-6
    num = np.zeros_like(m)
    for i in range(5):
        for j in range(5):
            e = np.zeros_like(m)
            e[i, j] = h
            up, down = _objective(m + e, b, s, c, **args)[0], _objective(m - e, b, s, c, **args)[0]
            num[i, j] = (up - down) / (2 * h)
    num_b = (_objective(m, b + h, s, c, **args)[0] - _objective(m, b - h, s, c, **args)[0]) / (2 * h)
    np.testing.assert_allclose(g_m, num, rtol=1e-5, atol=1e-7)
    assert g_b == pytest.approx(num_b, rel=1e-5, abs=1e-7)


def test_rotated_queries_improve_held_out_map(rotated_fit, rotated):
    qm, report = rotated_fit
    assert report["terms_evaluated"] == 24
    assert report["after_map"] > report["before_map"] + 0.15
    assert report["enabled"] is True and qm.enabled
    assert qm.report is report
    # the fitted map moves each term's query toward its confirmed audio
    q, a, y, terms = rotated
    conf = y == 1
    before = np.mean(np.sum(q[conf] * a[conf], axis=1))
    after = np.mean(np.sum(qm.apply(q[conf]) * a[conf], axis=1))
    assert after > before + 0.2


def test_ridge_keeps_the_map_near_identity():
    sample = checked_sample(seed=5, rotate=False)
    dist = []
    for lam in (0.003, 0.1, 10.0):
        qm, _ = fit_query_map(*sample, lam=lam, folds=2, steps=150)
        dist.append(np.linalg.norm(qm.matrix - np.eye(12)))
    assert dist[0] > dist[1] > dist[2]
    assert dist[2] < 0.05


def test_fitting_never_modifies_its_inputs(rotated):
    q, a, y, terms = (np.array(x, copy=True) if not isinstance(x, list) else list(x) for x in rotated)
    digest = lambda: [hashlib.sha256(x.tobytes()).hexdigest() for x in (q, a, y)] + [list(terms)]
    before = digest()
    for x in (q, a, y):
        x.flags.writeable = False  # any write in place would raise
    fit_query_map(q, a, y, terms, folds=2, steps=20)
    assert digest() == before


def test_fit_is_deterministic_and_hashes_its_sample(rotated_fit, rotated):
    q, a, y, terms = rotated
    again, _ = fit_query_map(q, a, y, terms, folds=4, seed=0)
    assert np.array_equal(again.matrix, rotated_fit[0].matrix)
    assert again.sample_hash == rotated_fit[0].sample_hash
    flipped = y.copy()
    flipped[1] = 1
    other, _ = fit_query_map(q, a, flipped, terms, folds=2, steps=5)
    assert other.sample_hash != again.sample_hash


def test_map_round_trips_through_json_exactly(rotated_fit):
    qm = rotated_fit[0]
    back = QueryMap.from_dict(json.loads(json.dumps(qm.to_dict())))
    assert np.array_equal(back.matrix, qm.matrix)
    assert (back.version, back.sample_hash, back.created) == (qm.version, qm.sample_hash, qm.created)
    assert back.report == qm.report and back.enabled


def test_from_dict_refuses_malformed_maps():
    good = QueryMap.identity(2).to_dict()
    with pytest.raises(TrawlError, match="version"):
        QueryMap.from_dict({**good, "version": 99})
    with pytest.raises(TrawlError, match="square"):
        QueryMap.from_dict({**good, "matrix": [[1.0, 0.0]]})
    with pytest.raises(TrawlError, match="non-finite"):
        QueryMap.from_dict({**good, "matrix": [[1.0, float("nan")], [0.0, 1.0]]})
    with pytest.raises(TrawlError, match="matrix"):
        QueryMap.from_dict({"version": 1})


def test_min_gain_sets_the_bar_and_cannot_tolerate_a_real_loss(rotated):
    qm, report = fit_query_map(*rotated, folds=2, steps=30, min_gain=1.0)
    assert report["enabled"] is False and "below" in report["reason"]
    assert not np.array_equal(qm.matrix, np.eye(12))  # the fitted map is still returned
    with pytest.raises(TrawlError, match="0.02"):
        fit_query_map(*rotated, min_gain=-0.05)


# --- refusals ---------------------------------------------------------------------


def test_tiny_and_malformed_samples_are_refused():
    q, a, y, terms = checked_sample(seed=4, d=4, n_terms=5, per_term=4)
    with pytest.raises(TrawlError, match="9 checked hits.*at least 10"):
        fit_query_map(q[:9], a[:9], y[:9], terms[:9])
    with pytest.raises(TrawlError, match="2 term.*at least 3"):
        two_terms = [t for t in terms[:8] for _ in (0, 1)]  # term0 and term1, 16 hits
        fit_query_map(q[:8].repeat(2, 0), a[:8].repeat(2, 0), y[:8].repeat(2, 0), two_terms)
    with pytest.raises(TrawlError, match="no confirmed hit"):
        fit_query_map(q, a, np.zeros_like(y), terms)
    with pytest.raises(TrawlError, match="does not line up"):
        fit_query_map(q, a[:-1], y, terms)
    with pytest.raises(TrawlError, match="does not line up"):
        fit_query_map(q, a, y, terms[:-1])
    with pytest.raises(TrawlError, match="verdict of checked hit 3"):
        fit_query_map(q, a, np.r_[y[:2], 2, y[3:]], terms)
    bad = q.copy()
    bad[0, 0] = np.nan
    with pytest.raises(TrawlError, match="non-finite"):
        fit_query_map(bad, a, y, terms)
    zero = a.copy()
    zero[5] = 0.0
    with pytest.raises(TrawlError, match="zero vector"):
        fit_query_map(q, zero, y, terms)
    with pytest.raises(TrawlError, match="folds"):
        fit_query_map(q, a, y, terms, folds=1)


def test_held_out_check_against_background_switches_on_a_map_that_undoes_a_rotation(rotated):
    """With background windows, held-out terms' confirmed hits are ranked among their rejected
    hits and the background; a map that undoes the queries' rotation must win there too."""
    rng = np.random.default_rng(11)
    background = _unit(rng.normal(size=(200, rotated[0].shape[1])))
    qm, report = fit_query_map(*rotated, folds=4, seed=0, background=background)
    assert report["terms_evaluated"] == len(set(rotated[3]))  # every term has a confirmed hit
    assert report["after_map"] > report["before_map"] and qm.enabled



def test_held_out_mtwv_is_reported_and_its_before_value_is_the_typed_queries_estimate():
    """The 'before' MTWV uses no fitted map, so it is evaluation.sampled_mtwv (checked against the NIST
    definition in test_evaluation.py) over every term's cosines, computed here directly."""
    from detector.evaluation import sampled_mtwv

    rng = np.random.default_rng(5)
    d, n_terms = 16, 8
    protos = _unit(rng.normal(size=(n_terms, d)))
    q, a, y, terms = [], [], [], []
    for t in range(n_terms):  # constructed: queries near their term's audio, confirmed hits close to it
        for j in range(6):
            confirmed = j % 2 == 0
            src = protos[t] if confirmed else rng.normal(size=d)  # rejected: audio of no checked term
            a.append(_unit(src + 0.05 * rng.normal(size=d)))
            q.append(_unit(protos[t] + 0.05 * rng.normal(size=d)) if j == 0 else q[-1])
            y.append(int(confirmed))
            terms.append(f"term{t}")
    q, a, y = np.array(q), np.array(a), np.array(y)
    background = _unit(rng.normal(size=(200, d)))
    _, report = fit_query_map(q, a, y, terms, folds=4, seed=0, background=background, total_seconds=3600.0)
    t = np.array(terms, dtype=object)
    per_term = []
    for name in sorted(set(terms)):
        own = (t == name) & (y == 1)
        q0 = q[np.flatnonzero(t == name)[0]]
        per_term.append((a[own] @ q0, a[~own] @ q0, background @ q0))
    assert report["before_mtwv"] == pytest.approx(sampled_mtwv(per_term, 3600.0)[0], abs=1e-9)
    assert report["before_mtwv"] > 0.9  # every confirmed hit above every random window: few misses, no false alarm
    assert 0.0 <= report["after_mtwv"] <= 1.0
    assert "before_mtwv" not in fit_query_map(q, a, y, terms, folds=4, seed=0, background=background)[1]


def test_paired_gain_p_is_the_one_sided_paired_t_test():
    from detector.adaptation import paired_gain_p

    # Hand-worked: gains 0.1, 0.3, 0.2: mean 0.2, sd 0.1, t = 0.2 / (0.1 / sqrt 3) = 2 sqrt 3, 2 degrees
    # of freedom, whose upper tail has the closed form (1 - t / sqrt(t^2 + 2)) / 2 (Student's t, 2 df).
    t = 2 * np.sqrt(3)
    assert paired_gain_p([0.5, 0.4, 0.6], [0.6, 0.7, 0.8]) == pytest.approx((1 - t / np.sqrt(t * t + 2)) / 2, rel=1e-9)
    assert paired_gain_p([0.6, 0.7, 0.8], [0.5, 0.4, 0.6]) == pytest.approx(1 - (1 - t / np.sqrt(t * t + 2)) / 2, rel=1e-9)
    assert paired_gain_p([0.5], [0.9]) == 1.0  # one term: nothing to test


def test_a_map_whose_held_out_gain_is_not_significant_stays_off(rotated):
    q, a, y, terms = rotated
    _, strict = fit_query_map(q, a, y, terms, significance=1e-12)
    _, loose = fit_query_map(q, a, y, terms, significance=0.5)
    assert loose["enabled"] and loose["gain_p"] < 0.5
    assert not strict["enabled"] and "not significant" in strict["reason"]
