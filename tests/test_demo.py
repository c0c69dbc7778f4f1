"""`trawl demo` on the bundled archive: a hit table, hits.csv with the documented columns, the measured MTWV."""

import csv
import re

import pytest
from typer.testing import CliRunner

from detector.cli import app
from detector.evaluation import read_reference
from detector.demo import DEMO_DIR


@pytest.mark.slow
def test_demo_runs_and_scores_itself(tmp_path):
    out = tmp_path / "hits.csv"
    r = CliRunner().invoke(app, ["demo", "--csv", str(out)])
    assert r.exit_code == 0, r.stdout
    m = re.search(r"MTWV (-?\d+\.\d+)", r.stdout)
    assert m, r.stdout
    with open(out, newline="", encoding="utf-8") as f:
        rows = list(csv.DictReader(f))
    assert list(rows[0].keys())[:10] == ["term", "broadcast", "start", "end", "start_hms", "end_hms", "score",
                                         "confidence", "rank", "verdict"]
    terms = {t.strip() for t in (DEMO_DIR / "terms.txt").read_text(encoding="utf-8").splitlines() if t.strip()}
    assert {r["term"] for r in rows} == terms
    # every hit points into a real demo broadcast, inside its duration
    ref = read_reference(DEMO_DIR / "ground_truth.tsv")
    ends = {}
    for b, s, e, w in ref:
        ends[b] = max(ends.get(b, 0.0), e)
    assert all(r["broadcast"] in ends and float(r["end"]) <= ends[r["broadcast"]] + 30 for r in rows)


def test_no_demo_word_occurs_in_the_training_corpus(corpus):
    """The demo must not lie: its words are absent from the real training speech (marks aside)."""
    from exporters.synth import plain

    corpus_words = {plain(line.split("\t")[-1]) for words in sorted(corpus.parent.glob("*/words.tsv"))
                    for line in words.read_text(encoding="utf-8").splitlines()[1:]}  # every shared corpus trains now
    demo_words = {plain(w) for w in (DEMO_DIR / "vocabulary.txt").read_text(encoding="utf-8").split()}
    assert demo_words and not demo_words & corpus_words


def test_synthetic_training_words_skip_excluded_words():
    """The training generator never produces a word it was told to exclude (the demo lexicon is excluded)."""
    import numpy as np

    from exporters.synth import excluded_words, plain, pseudo_words

    free = pseudo_words("es", 200, np.random.default_rng(5), set())
    banned = {plain(w) for w in free[::3]}
    again = pseudo_words("es", 200, np.random.default_rng(5), banned)
    assert not {plain(w) for w in again} & banned
    root = DEMO_DIR.parent
    assert {plain(w) for w in (DEMO_DIR / "vocabulary.txt").read_text(encoding="utf-8").split()} <= excluded_words(root)
