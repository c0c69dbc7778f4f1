"""Learned respelling rules (detector/rule_learning.py): alignment, candidates, learning, honesty.

Edit alignments are checked against the classic worked example of the Levenshtein distance
(kitten -> sitting, distance 3: Levenshtein 1966, as worked in most textbooks). Learning is
checked on constructed samples whose letter posteriors spell the true word exactly, so the
right rule is known by construction.
"""

import unicodedata

import numpy as np
import pytest

from detector import api
from detector.models import load
from detector.rule_learning import (Evidence, LearnedRules, edit_alignment, fit_learned_rules, heard_letters,
                                    is_foreign, learn_rules, phrase_pairs, sign_pairs, stretch)


def alignment_cost(a, b, pairs):
    return sum(1 for i, j in pairs if i is None or j is None or a[i] != b[j])


def test_edit_alignment_matches_the_worked_levenshtein_example():
    pairs = edit_alignment("kitten", "sitting")
    assert alignment_cost("kitten", "sitting", pairs) == 3  # k->s, e->i, +g
    assert [i for i, _ in pairs if i is not None] == list(range(6))
    assert [j for _, j in pairs if j is not None] == list(range(7))


def test_edit_alignment_of_empty_strings():
    assert edit_alignment("", "abc") == [(None, 0), (None, 1), (None, 2)]
    assert edit_alignment("ab", "") == [(0, None), (1, None)]


def test_phrase_pairs_find_digraphs_and_swaps():
    assert ("gn", "ny") in phrase_pairs("gnama", "nyama")
    assert ("c", "k") in phrase_pairs("ocondzi", "okondzi")
    pairs = phrase_pairs("pehta", "pεta")
    assert ("eh", "ε") in pairs
    assert all(src != tgt for src, tgt in pairs)
    assert phrase_pairs("mama", "mama") == set()


def test_a_letter_heard_once_is_also_proposed_doubled():
    # greedy CTC decoding merges a repeated letter, so "bahna" heard as "bana" may mean "baana"
    pairs = phrase_pairs("bahna", "bana")
    assert ("ah", "a") in pairs and ("ah", "aa") in pairs
    pairs = phrase_pairs("banda", "bada")
    assert ("an", "aa") in pairs and ("an", "nn") not in pairs  # the letter kept is the one doubled
    assert ("and", "aad") not in pairs  # only a one-letter drop from a pair of letters


def test_signs_the_letter_head_cannot_hear_get_mark_length_and_deletion_candidates():
    acute = "\u0301"
    # worked by hand: ':' after 'a' -> deletion, doubling 'a: -> aa', the mark; '1' follows ':', so no
    # doubling, but a letter comes before it (through ':'), so the mark and the deletion
    assert sign_pairs("ba:1", [acute]) == {(":", ""), ("a:", "aa"), (":", acute), ("1", ""), ("1", acute)}
    assert sign_pairs("1ba", [acute]) == {("1", "")}  # no letter before: no mark to carry
    assert sign_pairs("bana", [acute]) == set()


def test_heard_letters_is_ctc_best_path():
    # frames' best classes: a a blank a b b  (class 0 is the blank) -> "aab"
    lp = np.log(np.full((6, 3), 0.1))
    for t, c in enumerate([1, 1, 0, 1, 2, 2]):
        lp[t, c] = np.log(0.8)
    assert heard_letters(lp, ["a", "b"]) == "aab"


def test_stretch_keeps_the_margin_inside_the_signal():
    lp = np.zeros((100, 3))
    assert len(stretch(lp, 0.0, 0.5, 0.02)) == 28  # 0 .. (0.5 + 0.06) / 0.02
    assert len(stretch(lp, 1.9, 2.0, 0.02)) == 100 - 92  # from frame floor(1.84 / 0.02) = 92 to the end


def test_foreign_spellings():
    archive = "mama nyama kala bana"
    assert is_foreign("j", "jama jele", archive)  # never heard in the archive
    assert not is_foreign("a", "jama jele", archive)
    assert is_foreign(":", "ma:na", archive)  # no letters: never heard


# ------------------------------------------------------------------ learning on constructed samples

def spell_posteriors(word, table, frames_per_letter=3):
    """Log-probs whose best path spells the word exactly: each letter for a few frames, blanks between."""
    seq = []
    for c in word:
        seq += [table[c]] * frames_per_letter + [0]
    lp = np.full((len(seq) + 2, len(table) + 1), np.log(0.01))
    lp[0, 0] = lp[-1, 0] = np.log(0.9)
    for t, c in enumerate(seq, start=1):
        lp[t, c] = np.log(0.9)
    return lp.astype(np.float32)


WORDS = ["kalama", "makeko", "bokina", "tekimo", "likumo", "sakelo", "nokali", "dikota", "mokubi", "kotami",
         "pakilo", "lokena", "bakuna", "tikolo", "mekilo", "kobina"]
OTHERS = ["malima", "donata", "bilosa", "timaba", "nasuli", "pelito", "modila", "selumi", "ranobe", "lutina"]


def constructed_evidence(typed_of, confirmed_words):
    """A checked sample: each confirmed word once (its audio is exactly the word) and one rejected
    hit (the word with k spoken as g); background: other words. The 'audio vectors' are the spelling
    encoder's vectors of the true spellings, so the embedding view agrees with the letters."""
    m = load()
    table, alphabet = m.letter_table, m.alphabet
    terms, vecs, regions, conf = [], [], [], []
    near = [w.replace("k", "g") for w in WORDS]  # near-homophones: the hits a wrong spelling confuses
    true_vec = dict(zip(WORDS + OTHERS + near, api.embed_spellings(WORDS + OTHERS + near)))
    for w in confirmed_words:
        for audio, ok in ((w, True), (w.replace("k", "g"), False)):
            terms.append(typed_of(w))
            vecs.append(true_vec[audio])
            regions.append(spell_posteriors(audio, table))
            conf.append(ok)
    bg = OTHERS + [w for w in WORDS if w not in confirmed_words]
    return Evidence(terms, np.array(vecs), regions, np.array(conf), np.array([true_vec[w] for w in bg]),
                    [spell_posteriors(w, table) for w in bg], " ".join(OTHERS + WORDS), table, alphabet,
                    api.embed_spellings)


def q_for_k(w):
    return w.replace("k", "q")


def test_a_consistent_letter_swap_is_learned():
    ev = constructed_evidence(q_for_k, WORDS[:10])
    rules = learn_rules(ev)
    assert [r.to_text() for r in rules][:1] == ["q -> k"]


def test_learned_rules_are_switched_on_when_they_help_held_out_terms():
    ev = constructed_evidence(q_for_k, WORDS[:12])
    learned = fit_learned_rules(ev, folds=4)
    assert learned.enabled, learned.report
    assert learned.report["after_map"] > learned.report["before_map"]
    rs = learned.ruleset()
    assert [rs.apply(q_for_k(w)) for w in WORDS[12:]] == WORDS[12:]  # terms never checked come out right


def test_nothing_is_learned_when_the_typed_spelling_is_what_is_heard():
    ev = constructed_evidence(lambda w: w, WORDS[:10])
    learned = fit_learned_rules(ev, folds=4)
    assert learned.rules_text == "" and not learned.enabled


def test_learned_rules_round_trip_and_refuse_unknown_formats():
    ev = constructed_evidence(q_for_k, WORDS[:10])
    learned = fit_learned_rules(ev, folds=4)
    again = LearnedRules.from_dict(learned.to_dict())
    assert again.ruleset().to_text() == learned.ruleset().to_text() and again.enabled == learned.enabled
    bad = dict(learned.to_dict(), format_version=99)
    with pytest.raises(Exception, match="unknown format"):
        LearnedRules.from_dict(bad)


def test_held_out_check_ranks_a_terms_confirmed_hits_among_every_other_hit_and_the_background():
    """Hand-worked: hits of 'ab' (confirmed at [1, 0], rejected at [.6, .8]) and 'cd' (confirmed at
    [0, 1]), one background window at [.8, .6]. Spelled 'ab' (-> [1, 0]) the confirmed hit ranks
    first of four (AP 1); spelled 'xy' (-> [0, 1]) it ranks last (AP 1/4). Scores are cosine / 0.05."""
    from scipy.special import logsumexp

    from detector.rule_learning import TEMPERATURE, held_out_scores

    spell = {"ab": [1.0, 0.0], "xy": [0.0, 1.0]}
    ev = Evidence(["ab", "ab", "cd"], np.array([[1, 0], [0.6, 0.8], [0, 1]], np.float32), [None] * 3,
                  np.array([True, False, True]), np.array([[0.8, 0.6]], np.float32), [None], "", {}, [],
                  lambda ws: np.array([spell[w] for w in ws], np.float32))
    ap, ll = held_out_scores(ev, "ab", "ab")
    assert ap == 1.0
    assert ll == pytest.approx(20 - np.logaddexp(20, logsumexp([12, 0, 16])), abs=1e-4)
    assert held_out_scores(ev, "ab", "xy")[0] == pytest.approx(0.25)
    assert TEMPERATURE == 0.05
    assert held_out_scores(ev, "zz", "ab") is None  # no confirmed hit: nothing to judge by


def test_a_typed_tone_digit_is_learned_as_the_mark_the_letter_head_cannot_hear():
    """Typed 'ba1na' for 'bána': the letter head hears no tone, so only the sign candidates can
    propose '1 -> ́'. Audio vectors are the spelling encoder's vectors of the true (marked) words;
    letter posteriors spell their base letters; rejected hits are the unmarked words."""
    m = load()
    table, alphabet = m.letter_table, m.alphabet
    acute = "\u0301"
    base = WORDS[:12]
    true = [unicodedata.normalize("NFC", w[:1] + w[1] + acute + w[2:]) for w in base]  # high tone on the 2nd letter (a vowel)
    typed = [w[:2] + "1" + w[2:] for w in base]
    vec = dict(zip(true + base + OTHERS, api.embed_spellings(true + base + OTHERS)))
    terms, vecs, regions, conf = [], [], [], []
    for b, t, s in zip(base, true, typed):
        for audio, ok in ((t, True), (b, False)):
            terms.append(s)
            vecs.append(vec[audio])
            regions.append(spell_posteriors(b, table))
            conf.append(ok)
    ev = Evidence(terms, np.array(vecs), regions, np.array(conf), np.array([vec[w] for w in OTHERS]),
                  [spell_posteriors(w, table) for w in OTHERS], " ".join(OTHERS + base), table, alphabet,
                  api.embed_spellings, m.marks, archive_seconds=3600.0)
    rules = learn_rules(ev)
    assert rules and rules[0].to_text() == "1 -> " + acute
    learned = fit_learned_rules(ev, folds=4)
    assert learned.enabled, learned.report
    assert learned.report["after_mtwv"] >= learned.report["before_mtwv"]  # the MTWV estimate is reported too
