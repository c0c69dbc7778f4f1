"""Scoring: average precision, hit matching, TWV, precision/recall at k."""

from __future__ import annotations

import math
from fractions import Fraction

import numpy as np
import pytest

from detector import TrawlError
from detector.evaluation import (
    atwv,
    average_precision,
    match_hits,
    mtwv,
    precision_at_k,
    ranked_ap,
    sampled_mtwv,
    read_reference,
    recall_at_k,
    term_breakdown,
)
from detector.hits import Hit

B = "news/1998-03-02.wav"



def average_precision_score(labels, scores):
    """Reference library scikit-learn (the [test] extra); the tests that need it skip without it."""
    return pytest.importorskip("sklearn.metrics").average_precision_score(labels, scores)

def hit(term, start, end, score, broadcast=B, confidence=0.5):
    return Hit(term=term, broadcast=broadcast, start=start, end=end, score=score, confidence=confidence)


# ---------------------------------------------------------------- average precision


def test_ranked_ap_equals_sklearn_on_the_positives_among_the_negatives():
    # reference: scikit-learn's average_precision_score on the pooled scores
    rng = np.random.default_rng(3)
    pos, neg = rng.normal(1, 1, 4), rng.normal(0, 1, 30)
    expected = average_precision_score(np.r_[np.ones(4), np.zeros(30)], np.r_[pos, neg])
    assert ranked_ap(pos, neg) == pytest.approx(expected)
    assert ranked_ap([0.9], [0.5, 0.95]) == pytest.approx(0.5)  # hand-worked: the one positive ranks second


@pytest.mark.parametrize("seed", range(20))
def test_average_precision_equals_sklearn_with_ties(seed):
    # Reference library: sklearn.metrics.average_precision_score. Scores take
    # only 5 values, so most thresholds are shared by several pairs.
    rng = np.random.default_rng(seed)
    n = int(rng.integers(5, 60))
    labels = rng.integers(0, 2, size=n)
    labels[0] = 1  # at least one positive
    scores = rng.integers(0, 5, size=n) / 4.0
    assert average_precision(scores, labels) == pytest.approx(
        average_precision_score(labels, scores), abs=1e-12
    )


def test_average_precision_all_tied_and_continuous_scores():
    # All scores equal: one threshold, AP = precision of everything (sklearn agrees).
    labels = [1, 0, 0, 1, 0]
    assert average_precision([0.3] * 5, labels) == pytest.approx(
        average_precision_score(labels, [0.3] * 5)
    )
    rng = np.random.default_rng(7)
    scores = rng.normal(size=200)
    labels = rng.random(200) < 0.2
    assert average_precision(scores, labels) == pytest.approx(
        average_precision_score(labels, scores), abs=1e-12
    )


def test_average_precision_hand_worked():
    # Ranked labels 1, 0, 1: recall steps of 1/2 at precisions 1/1 and 2/3,
    # AP = 1/2 * 1 + 1/2 * 2/3 = 5/6.
    assert average_precision([0.9, 0.8, 0.7], [1, 0, 1]) == pytest.approx(5 / 6, abs=1e-12)
    # With a tie between the first two, they enter together: one step of
    # recall 1/2 at precision 1/2, then 1/2 at precision 2/3: AP = 7/12.
    assert average_precision([0.9, 0.9, 0.7], [0, 1, 1]) == pytest.approx(7 / 12, abs=1e-12)


# ---------------------------------------------------------------- matching


def test_midpoint_rule_at_the_boundary():
    # Reference occurrence 10.0-11.0 s: midpoint 10.5 s; tolerance 0.5 s.
    ref = [(B, 10.0, 11.0, "alpha")]
    inside = hit("alpha", 10.0, 12.0, 0.9)  # midpoint 11.0: 0.5 s away, counts
    assert match_hits([inside], ref) == [True]
    before = hit("alpha", 9.0, 11.0, 0.9)  # midpoint 10.0: 0.5 s away on the other side
    assert match_hits([before], ref) == [True]
    outside = hit("alpha", 10.0, 12.002, 0.9)  # midpoint 11.001: 0.501 s away
    assert match_hits([outside], ref) == [False]
    # A stricter tolerance turns the first one into a false alarm.
    assert match_hits([inside], ref, tolerance=0.25) == [False]


def test_match_needs_same_term_and_broadcast():
    ref = [(B, 10.0, 11.0, "Alpha")]
    assert match_hits([hit("alpha", 10.0, 11.0, 0.9)], ref) == [True]  # case folded (word type)
    assert match_hits([hit("beta", 10.0, 11.0, 0.9)], ref) == [False]
    assert match_hits([hit("alpha", 10.0, 11.0, 0.9, broadcast="news/other.wav")], ref) == [False]


def test_accent_insensitive_option():
    # Reference word with a combining grave (tone mark); the query typed without it.
    ref = [(B, 3.0, 3.5, "bo\u0300ta")]
    h = hit("bota", 3.0, 3.5, 0.9)
    assert match_hits([h], ref) == [False]
    assert match_hits([h], ref, accent_insensitive=True) == [True]
    # NFC and NFD spellings of the same word are the same type either way.
    assert match_hits([hit("b\u00f2ta", 3.0, 3.5, 0.9)], ref) == [True]


def test_greedy_one_to_one_duplicate_is_false_alarm():
    # Two hits on the one occurrence: the higher score takes it, whatever the
    # input order; the other is a false alarm.
    ref = [(B, 10.0, 11.0, "alpha")]
    low = hit("alpha", 10.0, 11.0, 0.3)
    high = hit("alpha", 10.1, 11.1, 0.9)
    assert match_hits([low, high], ref) == [False, True]
    assert match_hits([high, low], ref) == [True, False]
    # Ranked by confidence instead, the order flips.
    low.confidence, high.confidence = 0.9, 0.1
    assert match_hits([low, high], ref, key="confidence") == [True, False]


def test_greedy_takes_nearest_free_occurrence():
    # Occurrences with midpoints 10.5 and 11.3. The 0.9 hit (midpoint 11.0) is
    # 0.5 from the first and 0.3 from the second: it takes the second. The 0.5
    # hit (midpoint 10.4) then takes the first (0.1 away); had the first hit
    # taken 10.5, it would be 0.9 from 11.3, a false alarm.
    ref = [(B, 10.0, 11.0, "alpha"), (B, 10.8, 11.8, "alpha")]
    hits = [hit("alpha", 10.5, 11.5, 0.9), hit("alpha", 10.0, 10.8, 0.5)]
    assert match_hits(hits, ref) == [True, True]


def test_multi_word_term_occurrence():
    # "tala miro" occurs where the two words follow each other with a gap of at
    # most 0.5 s: at 1.0-2.0 (gap 0.1 s), not at 5.0-6.4 (gap 0.8 s).
    ref = [
        (B, 1.0, 1.4, "tala"), (B, 1.5, 2.0, "miro"),
        (B, 5.0, 5.4, "tala"), (B, 6.2, 6.4, "miro"),
    ]
    hits = [hit("Tala Miro", 1.0, 2.0, 0.9), hit("tala miro", 5.0, 6.4, 0.8)]
    assert match_hits(hits, ref) == [True, False]


# ---------------------------------------------------------------- TWV


def _worked_example():
    """Two terms that occur, one that does not; T = 600 s."""
    ref = [
        (B, 10.0, 11.0, "alpha"), (B, 50.0, 51.0, "alpha"),
        (B, 100.0, 101.0, "alpha"), (B, 200.0, 201.0, "alpha"),
        (B, 20.0, 21.0, "beta"), (B, 300.0, 301.0, "beta"),
    ]
    hits = [
        hit("alpha", 10.0, 11.0, 0.9),  # correct
        hit("alpha", 50.2, 51.2, 0.8),  # correct (midpoints 50.7 vs 50.5)
        hit("alpha", 100.0, 101.0, 0.7),  # correct
        hit("alpha", 400.0, 401.0, 0.6),  # false alarm
        hit("beta", 20.0, 21.0, 0.95),  # correct
        hit("beta", 300.0, 301.0, 0.5),  # correct
        hit("gamma", 5.0, 6.0, 0.99),  # gamma never occurs: excluded from TWV
    ]
    return hits, ref, ["alpha", "beta", "gamma"]


def test_twv_hand_worked_nist_definition():
    # NIST 2006 STD evaluation plan, beta = 999.9, T = 600 trials (seconds).
    # All hits (threshold 0):
    #   alpha: N_true = 4, N_correct = 3, N_FA = 1
    #          P_miss = 1 - 3/4 = 1/4, P_FA = 1 / (600 - 4) = 1/596
    #   beta:  N_true = 2, N_correct = 2, N_FA = 0 -> P_miss = 0, P_FA = 0
    #   gamma: N_true = 0 -> left out of the mean
    #   TWV = 1 - ((1/4 + 999.9/596) + 0) / 2
    #       = 1 - (0.25 + 1.6776845637...) / 2 = 0.0361577181...
    hits, ref, terms = _worked_example()
    beta = Fraction(9999, 10)
    expected = 1 - (Fraction(1, 4) + beta * Fraction(1, 596)) / 2
    assert atwv(hits, ref, terms, 600.0, threshold=0.0) == pytest.approx(float(expected), abs=1e-9)
    assert float(expected) == pytest.approx(0.0361577181, abs=1e-9)

    # Threshold 0.65 drops the alpha false alarm (0.6) and the second beta (0.5):
    #   alpha: P_miss = 1/4, P_FA = 0;  beta: P_miss = 1 - 1/2 = 1/2
    #   TWV = 1 - (1/4 + 1/2) / 2 = 0.625
    assert atwv(hits, ref, terms, 600.0, threshold=0.65) == pytest.approx(0.625, abs=1e-9)

    parts = term_breakdown(hits, ref, terms, 600.0, threshold=0.0)
    assert (parts["alpha"].n_true, parts["alpha"].n_correct, parts["alpha"].n_false_alarm) == (4, 3, 1)
    assert parts["alpha"].p_false_alarm == pytest.approx(1 / 596, abs=1e-12)
    assert parts["beta"].p_miss == 0.0
    assert parts["gamma"].n_true == 0 and math.isnan(parts["gamma"].value)


def test_mtwv_hand_worked():
    # Per accepted hit, TWV gains 1/(K*N_true) if correct, loses
    # 999.9/(K*(T-N_true)) if a false alarm (K = 2 terms that occur).
    # Descending: 0.95 beta +1/4 -> 0.25; 0.9 alpha +1/8 -> 0.375;
    # 0.8 -> 0.5; 0.7 -> 0.625; 0.6 alpha FA -999.9/1192 -> -0.214;
    # 0.5 beta +1/4 -> 0.036. Maximum 0.625 at threshold 0.7.
    hits, ref, terms = _worked_example()
    value, threshold = mtwv(hits, ref, terms, 600.0)
    assert value == pytest.approx(0.625, abs=1e-9)
    assert threshold == 0.7


def test_mtwv_no_useful_hit_accepts_nothing():
    # Only a false alarm: any threshold that accepts it gives a negative TWV,
    # accepting nothing gives 1 - mean(P_miss = 1) = 0.
    ref = [(B, 10.0, 11.0, "alpha")]
    value, threshold = mtwv([hit("alpha", 90.0, 91.0, 0.8)], ref, ["alpha"], 600.0)
    assert value == 0.0 and threshold == math.inf


@pytest.mark.parametrize("seed", range(5))
def test_mtwv_is_the_maximum_of_atwv_over_thresholds(seed):
    # Checked against the definition: MTWV = max over thresholds of ATWV,
    # computed here by brute force, one ATWV per distinct score.
    rng = np.random.default_rng(seed)
    words = ["alpha", "beta", "delta"]
    ref = [(B, float(t), float(t) + 0.6, words[i % 3]) for i, t in enumerate(rng.choice(500, 12, replace=False))]
    hits = []
    for broadcast, start, end, word in ref:
        if rng.random() < 0.8:
            hits.append(hit(word, start + rng.uniform(-0.3, 0.3), end, float(rng.integers(0, 8)) / 8))
    for _ in range(10):  # false alarms, some duplicates of true ones
        start = float(rng.uniform(0, 500))
        hits.append(hit(words[int(rng.integers(0, 3))], start, start + 0.5, float(rng.integers(0, 8)) / 8))
    total = 520.0
    value, threshold = mtwv(hits, ref, words, total, beta=20.0)
    candidates = sorted({h.score for h in hits}) + [math.inf]
    brute = [atwv(hits, ref, words, total, t, beta=20.0) for t in candidates]
    assert value == pytest.approx(max(brute), abs=1e-12)
    assert atwv(hits, ref, words, total, threshold, beta=20.0) == pytest.approx(value, abs=1e-12)
    for t in rng.uniform(-0.1, 1.1, size=10):
        assert value >= atwv(hits, ref, words, total, float(t), beta=20.0) - 1e-12


def test_sampled_mtwv_hand_worked():
    # One term, 2 confirmed hits (N_true = 2), one other checked hit, 4 sampled archive windows
    # (each stands for one second: P_FA from them = count / 4), T = 1000 s, beta = 1.
    # At threshold 0.5: P_miss = 0, P_FA = 1/4 (the 0.6 window) + 1/998 (the 0.7 checked hit)
    #   TWV = 1 - (0 + 0.25 + 1/998) = 0.748998
    # At 0.9: 1 - 1/2 = 0.5; at 0.7: 0.5 - 1/998; at 0.6: 0.25 - 1/998; at 0.3 and below, lower.
    value, threshold = sampled_mtwv([([0.9, 0.5], [0.7], [0.6, 0.3, 0.2, 0.1])], 1000.0, beta=1.0)
    assert value == pytest.approx(1 - 0.25 - 1 / 998, abs=1e-12)
    assert threshold == 0.5
    assert sampled_mtwv([([], [0.7], [0.6])], 1000.0) == (0.0, math.inf)  # no confirmed hit: no term


@pytest.mark.parametrize("seed", range(5))
def test_sampled_mtwv_without_a_window_sample_is_mtwv(seed):
    # Checked against mtwv (itself checked on the NIST definition above): when every occurrence
    # was hit and there is no window sample, the estimate is the exact MTWV.
    rng = np.random.default_rng(seed)
    words = ["alpha", "beta", "delta"]
    ref = [(B, float(t), float(t) + 0.6, words[i % 3]) for i, t in enumerate(rng.choice(500, 12, replace=False))]
    hits = [hit(w, s, e, float(rng.integers(0, 8)) / 8) for _, s, e, w in ref]
    for _ in range(10):
        start = float(600 + rng.uniform(0, 300))  # away from every occurrence: a false alarm
        hits.append(hit(words[int(rng.integers(0, 3))], start, start + 0.5, float(rng.integers(0, 8)) / 8))
    per_term = [([h.score for h in hits if h.term == w and h.start < 600], [h.score for h in hits if h.term == w and h.start >= 600], [])
                for w in words]
    assert sampled_mtwv(per_term, 1000.0, beta=20.0) == pytest.approx(mtwv(hits, ref, words, 1000.0, beta=20.0), abs=1e-12)


def test_twv_errors():
    hits, ref, _ = _worked_example()
    with pytest.raises(TrawlError, match="none of the terms"):
        atwv(hits, ref, ["gamma"], 600.0, 0.0)
    with pytest.raises(TrawlError, match="positive"):
        atwv(hits, ref, ["alpha"], 0.0, 0.0)


# ---------------------------------------------------------------- precision / recall at k


def test_precision_at_k_hand_worked():
    hits, ref, _ = _worked_example()
    # k = 2: alpha's top 2 (0.9, 0.8) both correct -> 2/2; beta's (0.95, 0.5)
    # both correct -> 2/2; gamma has no occurrence, left out. Mean 1.0.
    assert precision_at_k(hits, ref, k=2) == pytest.approx(1.0)
    # k = 4: alpha 3 correct of its 4 -> 3/4; beta has 2 hits, 2 correct,
    # still divided by 4 -> 1/2. Mean (3/4 + 1/2) / 2 = 0.625.
    assert precision_at_k(hits, ref, k=4) == pytest.approx(0.625)
    # A term that occurs once but got no hit counts as 0: (3/4 + 1/2 + 0) / 3.
    ref2 = ref + [(B, 450.0, 451.0, "delta")]
    assert precision_at_k(hits, ref2, k=4, terms=["alpha", "beta", "delta"]) == pytest.approx(1.25 / 3)


def test_recall_at_k_hand_worked():
    hits, ref, _ = _worked_example()
    # Pooled: 6 reference occurrences (4 alpha + 2 beta).
    # k = 1: alpha's best (0.9) and beta's best (0.95) are correct -> 2/6.
    assert recall_at_k(hits, ref, k=1) == pytest.approx(2 / 6)
    # k = 100: all 5 correct hits -> 5/6; with delta (1 occurrence, no hit) 5/7.
    assert recall_at_k(hits, ref, k=100) == pytest.approx(5 / 6)
    ref2 = ref + [(B, 450.0, 451.0, "delta")]
    assert recall_at_k(hits, ref2, terms=["alpha", "beta", "delta"]) == pytest.approx(5 / 7)


# ---------------------------------------------------------------- reading reference timings


def test_read_reference_tsv_and_csv(tmp_path):
    tsv = tmp_path / "ref.tsv"
    # Columns in another order, a BOM, an extra column, a blank line.
    tsv.write_bytes("\ufeffword\tstart\tend\tbroadcast\tspeaker\n"
                    "ሰላም\t1.25\t1.80\tnews/a.wav\tS1\n\n"
                    "नमस्ते\t2\t2.5\tnews/a.wav\tS2\n".encode("utf-8"))
    assert read_reference(tsv) == [
        ("news/a.wav", 1.25, 1.80, "ሰላም"),
        ("news/a.wav", 2.0, 2.5, "नमस्ते"),
    ]
    csv_file = tmp_path / "ref.csv"
    csv_file.write_text('broadcast,start,end,word\n"talk/b, part 2.wav",0.5,0.9,alpha\n', encoding="utf-8")
    assert read_reference(csv_file) == [("talk/b, part 2.wav", 0.5, 0.9, "alpha")]


def test_read_reference_errors_name_the_line(tmp_path):
    bad = tmp_path / "bad.csv"
    bad.write_text("broadcast,start,end,word\nnews/a.wav,1.0,1.5,alpha\nnews/a.wav,one,1.5,beta\n",
                   encoding="utf-8")
    with pytest.raises(TrawlError, match=r"line 3: start 'one' is not a number"):
        read_reference(bad)
    backwards = tmp_path / "backwards.csv"
    backwards.write_text("broadcast,start,end,word\nnews/a.wav,2.0,1.5,alpha\n", encoding="utf-8")
    with pytest.raises(TrawlError, match="line 2: end 1.5 is before start 2.0"):
        read_reference(backwards)
    headless = tmp_path / "headless.csv"
    headless.write_text("news/a.wav,1.0,1.5,alpha\n", encoding="utf-8")
    with pytest.raises(TrawlError, match="lacks the column"):
        read_reference(headless)
