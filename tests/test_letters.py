"""The letter pass: CTC keyword alignment, quantisation, chunked posteriors, what the index stores."""

import itertools

import numpy as np
import pytest

from detector import letters as L


def brute_force_cost(d, ids):
    """Exact search: the best CTC labelling of any stretch of frames that collapses to `ids`.

    Reference for keyword_scores: every start and end frame, every symbol sequence over the
    stretch (blank = 0), kept when merging repeats then dropping blanks gives `ids` (the CTC
    collapse, Graves et al. 2006); the cost of a sequence is the sum of d over its frames.
    """
    T, V = d.shape
    best = -np.inf
    for t1 in range(T):
        for t2 in range(t1, T):
            for seq in itertools.product(range(V), repeat=t2 - t1 + 1):
                merged = [c for k, c in enumerate(seq) if k == 0 or c != seq[k - 1]]
                if [c for c in merged if c != 0] == list(ids):
                    best = max(best, sum(d[t1 + k, c] for k, c in enumerate(seq)))
    return best


@pytest.mark.parametrize("ids", [[1, 2], [1, 1], [2, 1, 2], [1]])
def test_keyword_alignment_equals_exhaustive_search(ids):
    rng = np.random.default_rng(len(ids) * 7 + ids[0])
    for _ in range(4):
        logp = np.log(rng.dirichlet(np.ones(3) * 0.5, size=6)).astype(np.float32)
        cost, first, last = L.keyword_scores([logp], ids)
        d = logp - logp.max(axis=1, keepdims=True)
        assert cost[0] == pytest.approx(brute_force_cost(d, ids), abs=1e-5)
        assert 0 <= first[0] <= last[0] < 6
        assert L.keyword_scores([logp], ids, with_times=False)[0][0] == pytest.approx(brute_force_cost(d, ids), abs=1e-5)


def test_keyword_alignment_hand_worked():
    # Frames heard as: blank, a, blank, b, b, blank (every other symbol 10 nats lower).
    P = np.full((6, 4), -10.0, np.float32)
    for t, c in enumerate([0, 1, 0, 2, 2, 0]):
        P[t, c] = 0.0
    cost, first, last = L.keyword_scores([P], [1, 2])  # "ab": heard exactly, frames 1..3
    assert (cost[0], first[0], last[0]) == (0.0, 1, 3)
    cost, _, _ = L.keyword_scores([P], [1, 3])  # "ac": one letter never heard costs its 10 nats
    assert cost[0] == -10.0
    cost, _, _ = L.keyword_scores([P], [2, 2])  # "bb" needs a blank between the two b's: 10 nats
    assert cost[0] == -10.0
    # frames outside the alignment cost nothing: padding the stretch with pauses (heard as blank)
    # changes the cost not at all, and the alignment moves with the word
    pause = np.full((5, 4), -10.0, np.float32)
    pause[:, 0] = 0.0
    cost, first, last = L.keyword_scores([np.concatenate([pause, P[1:], pause[:3]])], [1, 2])
    assert (cost[0], first[0], last[0]) == (0.0, 5, 7)
    # a stretch shorter than the term cannot hold it
    cost, first, _ = L.keyword_scores([P[:1]], [1, 2])
    assert cost[0] == -np.inf and first[0] == -1


def test_quantised_posteriors_round_trip_within_half_a_step():
    logp = np.log(np.random.default_rng(0).dirichlet(np.ones(31), size=100)).astype(np.float32)
    back = L.dequantise(L.quantise(logp))
    keep = logp > -25.0
    assert np.abs(back - logp)[keep].max() <= L.QUANT_STEP / 2 + 1e-6
    assert L.quantise(np.array([[-1000.0]])).item() == L.QUANT_MAX  # very unlikely symbols saturate


def test_letter_classes_ignore_marks_and_unknown_letters():
    alphabet = L.alphabet_of(["<pad>", "<unk>", " ", "'", "a", "b", "n", "\u0301", "\u0303", "ω"])
    assert alphabet == ["a", "b", "n", "ω"]
    table = {c: i + 1 for i, c in enumerate(alphabet)}
    assert L.letter_ids("Bánω", table) == [2, 1, 3, 4]  # NFD: the accent is a mark, not a letter
    assert L.letter_ids("ñaq", table) == [3, 1]  # ñ = n + tilde; q is not in the alphabet


@pytest.fixture(scope="module")
def models():
    from detector.models import load

    m = load()
    if not m.has_letters:
        pytest.skip("the installed models have no letter head")
    return m


def test_chunked_posteriors_equal_one_pass(models, joined_broadcast, monkeypatch):
    import soundfile as sf

    from detector.features import log_mel

    folder, name, _ = joined_broadcast
    x, _ = sf.read(str(folder / name), dtype="float32")
    feats = log_mel(x)
    frames = models.frames(feats)
    whole = L.letter_logprobs(models, feats, frames)
    monkeypatch.setattr(L, "CHUNK", 150)
    chunked = L.letter_logprobs(models, feats, frames)
    assert whole.shape == (len(frames), len(models.alphabet) + 1)
    np.testing.assert_allclose(chunked, whole, atol=1e-4)


def test_index_stores_letter_posteriors_per_broadcast(models, joined_broadcast, tmp_path):
    from detector.index_store import Index
    from detector.indexing import index_archive

    folder, name, _ = joined_broadcast
    index_archive(folder, tmp_path / "idx")
    idx = Index.open(tmp_path / "idx")
    row = idx.broadcasts()[0]
    post = idx.letters(row)
    assert post.dtype == np.uint8 and post.shape[1] == len(models.alphabet) + 1
    assert abs(len(post) - row["duration"] / 0.02) <= 2
    # each frame is a distribution: the probabilities of the dequantised frame sum to about one
    p = np.exp(L.dequantise(np.asarray(post[:200]))).sum(axis=1)
    assert np.all((p > 0.7) & (p < 1.3))


@pytest.fixture(scope="module")
def searcher(models, joined_broadcast, tmp_path_factory):
    from detector.indexing import index_archive
    from detector.search import Searcher

    folder, _, _ = joined_broadcast
    idx = tmp_path_factory.mktemp("letters") / "idx"
    index_archive(folder, idx)
    return Searcher(idx)


def test_sum_to_one_normaliser_hand_worked(searcher):
    # tau = 1: evidence 0 and ln 3 share exp(0) + exp(ln 3) = 4, so the normaliser is ln 4 and the
    # normalised scores are ln(1/4) and ln(3/4): shares that sum to one (Mamou et al. 2013).
    searcher.tau = 1.0
    assert searcher.normaliser(np.array([0.0, np.log(3.0)])) == pytest.approx(np.log(4.0))
    searcher.tau = 2.0  # tau = 2: 2 * ln(exp(0) + exp(ln 3 / 2)) = 2 * ln(1 + sqrt 3)
    assert searcher.normaliser(np.array([0.0, np.log(3.0)])) == pytest.approx(2 * np.log(1 + np.sqrt(3.0)))
    searcher.tau = float(searcher.models.rescoring.get("tau", 1.0))


def test_a_terms_hits_share_at_most_its_whole_mass(searcher, joined_broadcast):
    _, _, words = joined_broadcast
    term = max({w for _, _, w in words}, key=len)
    searcher.scoring = "sum-to-one"  # earlier releases' normalisation, kept for comparison
    try:
        hits = searcher.search(term, top=50)
    finally:
        searcher.scoring = "background"
    assert hits and all(h.aligned for h in hits[:10])
    assert sum(np.exp(h.score / searcher.tau) for h in hits) <= 1.0 + 1e-6


def test_rescoring_a_listed_hit_gives_its_listed_score(searcher, joined_broadcast):
    """calibrate re-scores checked rows from the index: a hit as search listed it must score the same."""
    _, _, words = joined_broadcast
    for term in sorted({w for _, _, w in words if len(w) >= 6}):
        for h in searcher.search(term, top=3):
            score, raw = searcher.rescore(term, h.broadcast, h.start, h.end)
            assert (score, raw) == (pytest.approx(h.score, abs=1e-9), pytest.approx(h.raw, abs=1e-9)), (h, score)
