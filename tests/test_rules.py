"""Respelling rules: hand-worked examples of the semantics documented in detector/rules.py."""

from __future__ import annotations

import unicodedata
from pathlib import Path

import pytest

from detector import TrawlError
from detector.rules import Rule, RuleSet, load_rules, parse_rules

EXAMPLE = Path(__file__).resolve().parents[1] / "models" / "rules" / "example-respelling.rules"


def test_multi_letter_rule_then_single_letter():
    # "chica": rule 1 gives "tʃica", rule 2 then rewrites the remaining c: "tʃika".
    rules = parse_rules("ch -> tʃ\nc -> k\n")
    assert rules.apply("chica") == "tʃika"


def test_order_matters_when_a_single_letter_rule_comes_first():
    # "chica": rule 1 rewrites both c's ("khika"), so rule 2 finds no "ch".
    rules = parse_rules("c -> k\nch -> tʃ\n")
    assert rules.apply("chica") == "khika"


def test_earlier_rule_feeds_a_later_one():
    # "taph": rule 1 gives "taf"; now f ends the word, so rule 2 gives "tav".
    rules = parse_rules("ph -> f\nf$ -> v\n")
    assert rules.apply("taph") == "tav"
    # without rule 1 the word does not end in f and rule 2 does nothing
    assert parse_rules("f$ -> v\n").apply("taph") == "taph"


def test_word_start_and_end_anchors():
    rules = parse_rules("^h ->\ne$ -> ə\n")
    # "hahe": only the first h goes ("ahe"), only the last e changes ("ahə")
    assert rules.apply("hahe") == "ahə"
    assert rules.apply("hehe") == "ehə"
    # in a term of several words, ^ and $ mark the edges of each word
    assert rules.apply("hele  hobe") == "elə obə"


def test_whole_word_anchor():
    rules = parse_rules("^o$ -> wo\n")
    assert rules.apply("o lolo o") == "wo lolo wo"
    assert rules.apply("oko") == "oko"


def test_non_overlapping_left_to_right_single_pass():
    # "aaa": the first two a's match, the third is left alone.
    assert parse_rules("aa -> b\n").apply("aaa") == "ba"
    # one pass only: what a rule writes is not read again by the same rule, so no loop
    assert parse_rules("a -> aa\n").apply("bana") == "baanaa"


def test_nfc_and_nfd_input_match_the_same_rule():
    rules = parse_rules("é -> e\n")
    nfc = "b\u00e9"  # é as one code point
    nfd = "be\u0301"  # e + combining acute
    assert rules.apply(nfc) == "be"
    assert rules.apply(nfd) == "be"
    # a rule written in NFD matches NFC input too
    assert parse_rules("e\u0301 -> e\n").apply(nfc) == "be"


def test_rules_match_whole_letters_only():
    # a rule for plain e does not touch é, whichever way é is typed
    rules = parse_rules("e -> ə\n")
    assert rules.apply("bébe") == "bébə"
    assert rules.apply(unicodedata.normalize("NFD", "bébe")) == "bébə"
    # ɛ́ has no precomposed form: it stays ɛ + U+0301 in NFC, and still counts as one letter
    assert parse_rules("ɛ -> e\n").apply("sɛ\u0301lɛ") == "sɛ\u0301le"


def test_case_is_ignored_and_output_is_nfc_lower_case():
    rules = parse_rules("CH -> tʃ\n")
    assert rules.apply("CHICA") == "tʃica"
    # a right side ending in a combining mark composes with nothing before it, but the
    # result is NFC: "a" + U+0301 written by the rule becomes "á"
    assert parse_rules("a: -> a\u0301\n").apply("ka:") == "k\u00e1"


def test_comments_blank_lines_and_line_numbers():
    text = (
        "# respelling for an invented spelling\n"
        "\n"
        "ph -> f   # inline comment\n"
        "   \n"
        "^h ->\n"
        "oo → u\n"
    )
    rules = parse_rules(text)
    assert rules.rules == (
        Rule("ph", "f", line=3),
        Rule("h", "", at_start=True, line=5),
        Rule("oo", "u", line=6),
    )
    assert parse_rules("# nothing but a comment\n\n").apply("Mapo") == "mapo"


def test_canonical_text_round_trips_and_digest_ignores_layout():
    a = parse_rules("# x\nph   ->   f\n\n^h ->   # drop it\ne$ -> ə\n")
    b = parse_rules("ph -> f\n^h ->\ne$ -> ə\n")
    assert a.to_text() == "ph -> f\n^h ->\ne$ -> ə\n"
    assert a.digest() == b.digest()
    again = parse_rules(a.to_text())
    assert again.to_text() == a.to_text()
    assert [(r.left, r.right, r.at_start, r.at_end) for r in again.rules] == [
        (r.left, r.right, r.at_start, r.at_end) for r in a.rules
    ]
    reordered = parse_rules("^h ->\nph -> f\ne$ -> ə\n")
    assert reordered.digest() != a.digest()
    assert len(a.digest()) == 64


def test_trace_lists_the_rules_that_changed_the_term():
    rules = parse_rules("ph -> f\nx -> ks\nf$ -> v\n")
    steps = rules.trace("taph")
    assert [(s.line, s.before, s.after) for s in steps] == [(1, "taph", "taf"), (3, "taf", "tav")]


@pytest.mark.parametrize(
    "text, line, words",
    [
        ("a -> b\n\nfoo\n", 3, "expected a rule"),
        ("a -> b -> c\n", 1, "one arrow"),
        ("a -> b\n -> x\n", 2, "left side of the rule is empty"),
        ("^ -> x\n", 1, "left side of the rule is empty"),
        ("^$ -> x\n", 1, "left side of the rule is empty"),
        ("a b -> c\n", 1, "contains a space"),
        ("a -> b c\n", 1, "contains a space"),
        ("a^b -> c\n", 1, "'^' may only open"),
        ("a -> b$\n", 1, "left side only"),
        ("# c\nka -> ka\n", 2, "to itself"),
        ("^ka$ ->\n", 1, "deletes the whole word"),
        ("\u0301 -> x\n", 1, "combining mark"),
    ],
)
def test_syntax_errors_name_source_and_line(text, line, words):
    with pytest.raises(TrawlError) as err:
        parse_rules(text, source="my.rules")
    assert f"my.rules, line {line}:" in str(err.value)
    assert words in str(err.value)


def test_rules_that_delete_every_letter_are_refused_at_parse_time():
    # 26 rules deleting a..z. The probe word is a..z followed by every left side, so
    # rule k removes the k-th letter everywhere and rule 26 (line 27, after a comment)
    # removes the last one.
    text = "# delete everything\n" + "".join(f"{c} ->\n" for c in "abcdefghijklmnopqrstuvwxyz")
    with pytest.raises(TrawlError, match=r"x\.rules, line 27: .*no letter is left"):
        parse_rules(text, source="x.rules")


def test_rules_that_grow_words_without_measure_are_refused():
    # probe: a..z + "a" + "a" + "a" = 29 characters, 4 of them a; guard: max(64, 8*29) = 232.
    # line 1: 4 a -> 16 a, 41 characters; line 2: 64 a, 89; line 3: 256 a, 281 > 232.
    with pytest.raises(TrawlError, match=r"rules, line 3: .*grows past 232"):
        parse_rules("a -> aaaa\na -> aaaa\na -> aaaa\n")


def test_apply_time_error_when_a_term_grows_past_the_guard():
    # parse-time probe: a..z + "aa" = 28 characters, 3 a; line 1 -> 9 a (34), line 2 -> 27 a
    # (52 <= 232): accepted. The term "aaaaaaaa" (8; guard max(64, 64) = 64) becomes 24 a
    # after line 1 and 72 a after line 2: refused, naming line 2.
    rules = parse_rules("a -> aaa\na -> aaa\n")
    assert rules.apply("aa") == "a" * 18
    with pytest.raises(TrawlError, match=r"rules, line 2: .*grow past 64"):
        rules.apply("aaaaaaaa")


def test_apply_time_error_when_a_rule_removes_the_last_letter(tmp_path):
    path = tmp_path / "lang.rules"
    path.write_text("# silent initial h\n^h ->\n", encoding="utf-8")
    rules = load_rules(path)
    assert rules.apply("hamba") == "amba"
    with pytest.raises(TrawlError) as err:
        rules.apply("H")
    assert f"{path}, line 2:" in str(err.value)
    assert "without letters" in str(err.value)
    # a term of two words keeps the word that still has letters
    assert rules.apply("h hamba") == "amba"


def test_term_without_letters_is_refused():
    with pytest.raises(TrawlError, match="no letters"):
        parse_rules("a -> b\n").apply("123 !")


def test_load_rules_file_errors(tmp_path):
    with pytest.raises(TrawlError, match="not found"):
        load_rules(tmp_path / "missing.rules")
    bad = tmp_path / "bad.rules"
    bad.write_bytes(b"a -> b\nc -> \xff\n")
    with pytest.raises(TrawlError, match=r"bad\.rules, line 2: .*not UTF-8"):
        load_rules(bad)
    bom = tmp_path / "bom.rules"
    bom.write_bytes("\ufeffph -> f\n".encode("utf-8"))
    assert load_rules(bom).apply("phapha") == "fafa"


def test_example_rules_file_parses_and_does_what_its_comments_say():
    rules = load_rules(EXAMPLE)
    assert isinstance(rules, RuleSet) and len(rules) > 0
    # each pair is worked by hand from the comments in the example file
    assert rules.apply("matcho") == "matso"  # tch -> ts; its s holds no c for c -> k
    assert rules.apply("cabo") == "kabo"
    assert rules.apply("hamba") == "amba"  # h only at the start of a word
    assert rules.apply("aha") == "aha"
    assert rules.apply("Ka:mè") == "kaamε"  # a: -> aa, è -> ε
    assert rules.apply("jo1la") == "yóla"  # j -> y, o1 -> ó
