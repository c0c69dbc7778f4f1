"""Any script in, a clear answer out; posteriors that do not depend on a term's count; term-specific thresholds."""

import json
import math

import numpy as np
import pytest
import soundfile as sf
from anyascii import anyascii
from typer.testing import CliRunner

from detector import TrawlError
from detector.calibration import twv_threshold
from detector.cli import app
from detector.models import load
from detector.search import pool_log_odds
from detector.spelling import readable_term, transliterate

runner = CliRunner()


def run(*args):
    r = runner.invoke(app, [str(a) for a in args])
    return r.exit_code, r.stdout, r.stderr


# ------------------------------------------------------------------ transliteration
@pytest.mark.parametrize("word", ["Москва", "ירושלים", "北京", "አዲስ", "القاهرة"])  # Cyrillic, Hebrew, Han, Ethiopic, Arabic
def test_letters_the_model_cannot_read_are_written_as_the_library_writes_them(word):
    """Every letter of these scripts is outside the model's symbols, so the whole term must come out
    exactly as the anyascii library transliterates it (lower-cased)."""
    symbols = set(load().symbols)
    assert transliterate(word, symbols) == anyascii(word).lower()
    assert readable_term(word, symbols) == anyascii(word).lower()


def test_letters_and_marks_the_model_reads_are_kept():
    """The card's symbols include ω and the combining acute accent (NFD), so a Mboshi spelling passes
    unchanged; a Latin letter outside the inventory (ø) is transliterated as anyascii writes it."""
    symbols = set(load().symbols)
    assert transliterate("mósωngώsώ", symbols) == "mósωngώsώ"
    assert transliterate("kø", symbols) == "k" + anyascii("ø")


def test_a_term_with_nothing_readable_is_refused():
    """U+0640 (Arabic tatweel) is a letter to Unicode, but anyascii writes it as nothing."""
    assert anyascii("\u0640") == ""
    with pytest.raises(TrawlError, match="no letters the model can read"):
        readable_term("\u0640\u0640", set(load().symbols))


# ------------------------------------------------------------------ term-specific thresholds
def test_twv_threshold_matches_the_published_formula_hand_worked():
    """Keyword-specific thresholding (Miller et al., Interspeech 2007): accept a hit when
    p > N / (T / beta + (beta - 1) / beta * N), N the term's expected count, T the searched seconds.
    Hand-worked for 20 minutes (T = 1200 s), beta = 999.9 (NIST 2006 STD evaluation plan):
    T / beta = 1200 / 999.9 = 1.200120, (beta - 1) / beta = 998.9 / 999.9 = 0.999000:
      N = 1:  1 / (1.200120 + 0.999000 * 1)  = 1 / 2.199120  = 0.454727
      N = 28: 28 / (1.200120 + 0.999000 * 28) = 28 / 29.172117 = 0.959820
    A term spoken 28 times needs a far surer hit than one spoken once."""
    assert twv_threshold(1.0, 1200.0) == pytest.approx(0.454727, abs=1e-6)
    assert twv_threshold(28.0, 1200.0) == pytest.approx(0.959820, abs=1e-6)


def test_identical_evidence_gets_an_identical_posterior_whether_a_term_has_1_or_20_such_hits():
    """Constructed pools: the same hit evidence (2.0) once, or twenty times, among the same weaker
    distractors, against the same background. Each copy's posterior must be the same in both pools,
    and the expected count must grow twenty-fold with the copies (sum of posteriors). Under per-term
    sum-to-one (tau 1) the same hit would have lost log(20) = 3.0 to its nineteen twins."""
    rng = np.random.default_rng(0)
    distractors = np.sort(rng.uniform(-20.0, -15.0, 179))[::-1]  # far below the hits: e^-15 is negligible
    one = np.r_[2.0, distractors, np.full(19, -25.0)]  # the same pool size, the extra places filled weakly
    twenty = np.r_[np.full(20, 2.0), distractors]
    weights, intercept = (0.3, 1.0, 0.3, 1.8), -8.5
    lo1, _ = pool_log_odds(one, -1.5, -4.0, 7, weights, intercept)
    lo20, _ = pool_log_odds(twenty, -1.5, -4.0, 7, weights, intercept)
    assert np.all(lo20[:20] == lo1[0])
    p1 = 1 / (1 + math.exp(-lo1[0]))
    hits_only = lambda lo, k: float(np.sum(1 / (1 + np.exp(-lo[:k]))))  # noqa: E731
    assert hits_only(lo20, 20) == pytest.approx(20 * p1, rel=1e-12)
    from scipy.special import logsumexp  # the earlier per-term normalisation, for contrast

    assert (2.0 - logsumexp(one)) - (2.0 - logsumexp(twenty)) == pytest.approx(math.log(20), abs=0.01)


# ------------------------------------------------------------------ the command line
@pytest.fixture(scope="module")
def index(joined_broadcast, tmp_path_factory):
    folder, _, _ = joined_broadcast
    idx = tmp_path_factory.mktemp("decisions") / "idx"
    code, out, err = run("index", folder, "--index", idx)
    assert code == 0, out + err
    return idx


def test_other_scripts_are_searched_and_show_what_was_searched(index, tmp_path):
    """The hit list says what the model was given: anyascii's writing of the Cyrillic term."""
    code, out, err = run("search", "Москва", "--index", index, "--top", "3", "--json")
    assert code == 0, err
    data = json.loads(out)
    assert data and all(d["term"] == "москва" and d["searched"] == anyascii("москва") for d in data)
    # the archive never says it: the uncalibrated confidence must not claim it does
    assert max(d["confidence"] for d in data) < 0.5
    code, out, err = run("search", "北京", "--index", index, "--top", "2", "--csv", tmp_path / "h.csv")
    assert code == 0, err
    assert anyascii("北京").lower() in out  # the table's "searched" column
    header = (tmp_path / "h.csv").read_text(encoding="utf-8").splitlines()[0].split(",")
    assert header[:10] == ["term", "broadcast", "start", "end", "start_hms", "end_hms", "score", "confidence",
                           "rank", "verdict"] and "searched" in header[10:]


def test_unreadable_term_gets_one_line(index):
    code, out, err = run("search", "\u0640\u0640", "--index", index)
    lines = [ln for ln in (out + err).splitlines() if ln.strip()]
    assert code == 1 and len(lines) == 1 and "no letters the model can read" in lines[0]


def test_an_example_without_speech_is_refused(index, tmp_path, corpus):
    silent = tmp_path / "silence.wav"
    sf.write(str(silent), np.zeros(16000, np.float32), 16000)
    code, out, err = run("search", "--example", silent, "--index", index)
    lines = [ln for ln in (out + err).splitlines() if ln.strip()]
    assert code == 1 and len(lines) == 1 and "no speech" in lines[0]
    # a word cut from the corpus (mbA00002, 0.926-1.656 s, in words.tsv) is speech and is searched
    x, sr = sf.read(str(corpus / "audio" / "mbA00002.opus"), dtype="float32")
    word = tmp_path / "word.wav"
    sf.write(str(word), x[int(0.926 * sr):int(1.656 * sr)], sr)
    code, out, err = run("search", "--example", word, "--index", index, "--top", "2", "--json")
    assert code == 0 and len(json.loads(out)) == 2, err


def test_a_bad_line_in_a_batch_is_reported_and_the_rest_searched(index, tmp_path):
    terms = tmp_path / "terms.txt"
    terms.write_text("mósωngώsώ\n# a comment\n1234 !!\npórá\n", encoding="utf-8")
    code, out, err = run("search", "--terms", terms, "--index", index, "--top", "2", "--json")
    assert code == 1  # as `trawl index` does when a file failed: the rest is done, the exit says not all
    assert f"{terms} line 3" in err and "no letters" in err
    assert {d["term"] for d in json.loads(out)} == {"mósωngώsώ", "pórá"}


def test_each_term_shows_its_expected_count_and_twv_threshold(index):
    """With every candidate listed (--top above the pool), the expected count is the sum of the listed
    confidences, and the TWV threshold is Miller et al.'s formula (see above) of that count, with T the
    indexed seconds and beta 999.9; without a calibration no threshold is applied, and the output says so."""
    from detector.index_store import Index

    code, out, err = run("search", "mósωngώsώ", "--index", index, "--top", "5000", "--json")
    assert code == 0, err
    data = json.loads(out)
    n = data[0]["expected_count"]
    assert n == pytest.approx(sum(d["confidence"] for d in data), abs=1e-3 + 1e-4 * len(data))
    seconds = Index.open(index).total_seconds()
    assert data[0]["twv_threshold"] == pytest.approx(999.9 * n / (seconds + 998.9 * n), abs=1e-4)
    assert {d["threshold_applied"] for d in data} == {"none: uncalibrated confidence"}
    code, out, err = run("search", "mósωngώsώ", "--index", index, "--top", "2")
    assert "none applied: the confidence is uncalibrated" in out and "TWV threshold" in out
