"""The public API: unit vectors, span independence and locality, clear errors, the card check."""

import json
import shutil

import numpy as np
import pytest

from detector import TrawlError, api
from detector.models import Models, check_card
from conftest import aligned_words, read_utterance

RNG = np.random.default_rng(3)


def test_spelling_vectors_are_unit_rows():
    v = api.embed_spellings(["ngá", "ngá", "okándá", "mósωngώsώ"])
    assert v.shape[0] == 4 and v.dtype == np.float32
    np.testing.assert_allclose(np.linalg.norm(v, axis=1), 1.0, atol=1e-5)
    np.testing.assert_allclose(v[0], v[1], atol=1e-6)  # same word, same vector


def test_nfc_and_nfd_spellings_embed_alike():
    import unicodedata

    w = "okándá"
    a = api.embed_spellings([unicodedata.normalize("NFC", w), unicodedata.normalize("NFD", w), w.upper()])
    np.testing.assert_allclose(a[0], a[1], atol=1e-6)
    np.testing.assert_allclose(a[0], a[2], atol=1e-6)


def test_span_vectors_unit_and_independent_of_other_spans(corpus):
    x = read_utterance(corpus, "mbA00002")
    spans = [(s, e) for s, e, _ in aligned_words(corpus, "mbA00002") if e - s >= 0.1]
    both = api.embed_spans(x, 16000, spans)
    np.testing.assert_allclose(np.linalg.norm(both, axis=1), 1.0, atol=1e-5)
    for i, sp in enumerate(spans):
        alone = api.embed_spans(x, 16000, [sp])[0]
        np.testing.assert_allclose(alone, both[i], atol=1e-5)


def test_same_span_same_vector_in_short_file_and_long_broadcast(corpus):
    """Contract: a span's vector uses at most 2 s either side, so it does not depend on the file around it."""
    x = read_utterance(corpus, "mbA00004")
    noise = (RNG.standard_normal(16000 * 90) * 0.01).astype(np.float32)
    offset = 45.0 + 0.0137  # not on the 10 ms / 20 ms grids
    k = int(round(offset * 16000))
    long = noise.copy()
    long[k : k + len(x)] += x
    short_from = k - 16000 * 3  # the short file starts 3 s before the utterance
    short = long[short_from : short_from + 16000 * 10]
    s, e, _ = max(aligned_words(corpus, "mbA00004"), key=lambda w: w[1] - w[0])
    a = api.embed_spans(long, 16000, [(offset + s, offset + e)])[0]
    b = api.embed_spans(short, 16000, [(offset + s - short_from / 16000, offset + e - short_from / 16000)])[0]
    assert np.abs(a - b).max() < 1e-4


def test_any_sample_rate_is_resampled(corpus):
    import soxr

    x = read_utterance(corpus, "mbA00002")
    s, e, _ = aligned_words(corpus, "mbA00002")[0]
    x44 = soxr.resample(x, 16000, 44100)
    a = api.embed_spans(x, 16000, [(s, e)])[0]
    b = api.embed_spans(x44, 44100, [(s, e)])[0]
    assert float(a @ b) > 0.98  # the same word after a round trip through 44.1 kHz


@pytest.mark.parametrize("words", [[], ["123 !"], ["ok", "--"]])
def test_bad_spellings_raise_value_error(words):
    with pytest.raises(ValueError):
        api.embed_spellings(words)


@pytest.mark.parametrize("spans", [[], [(1.0, 0.5)], [(1.0, 1.0)], [(-0.5, 0.3)], [(0.5, 99.0)], [(0.1, float("nan"))]])
def test_bad_spans_raise_value_error(spans):
    x = np.zeros(16000 * 3, np.float32)
    with pytest.raises(ValueError):
        api.embed_spans(x, 16000, spans)


def test_non_finite_samples_raise_value_error():
    x = np.zeros(16000 * 2, np.float32)
    x[100] = np.nan
    with pytest.raises(ValueError):
        api.embed_spans(x, 16000, [(0.5, 1.0)])
    with pytest.raises(ValueError):
        api.embed_spans(np.zeros(0, np.float32), 16000, [(0.0, 0.1)])


def test_card_disagreeing_with_feature_settings_is_refused(tmp_path):
    from detector.models import models_dir

    src = models_dir()
    for f in src.iterdir():
        if f.is_file():
            shutil.copy(f, tmp_path / f.name)
    card = json.loads((tmp_path / "card.json").read_text())
    card["features"]["n_mels"] = 64
    (tmp_path / "card.json").write_text(json.dumps(card))
    with pytest.raises(TrawlError, match="n_mels"):
        Models(tmp_path)
    card["features"]["n_mels"] = 40
    card["files"]["frames"]["sha256"] = "0" * 64
    (tmp_path / "card.json").write_text(json.dumps(card))
    with pytest.raises(TrawlError, match="does not match"):
        Models(tmp_path)


def test_check_card_accepts_the_shipped_card():
    from detector.models import models_dir

    check_card(json.loads((models_dir() / "card.json").read_text()))
