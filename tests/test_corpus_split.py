"""Training and measurement splits of the shared corpora (exporters/corpus.py)."""

import pytest

from conftest import CORPORA
from exporters.corpus import CORPUS_ROLES, Utterance, corpus_splits, split_by_speaker


def _utts(speakers: int, per: int) -> list[Utterance]:
    return [Utterance(f"u{s}-{k}", f"spk{s}", "w", None, [(0.0, 0.5, "w")]) for s in range(speakers) for k in range(per)]


def test_speaker_split_never_puts_a_speaker_on_both_sides():
    train, dev, held = split_by_speaker(_utts(30, 4))
    sides = [{u.speaker for u in part} for part in (train, dev, held)]
    assert not (sides[0] & sides[1]) and not (sides[0] & sides[2]) and not (sides[1] & sides[2])
    # hand-worked shares of 30 speakers: 20 % held out = 6, 10 % dev = 3, the other 21 train
    assert [len(s) for s in sides] == [21, 3, 6]
    assert sum(map(len, (train, dev, held))) == 120  # every utterance lands on exactly one side


def test_speaker_split_is_deterministic_and_keeps_two_speaker_corpora_whole():
    a = split_by_speaker(_utts(12, 2))
    b = split_by_speaker(list(reversed(_utts(12, 2))))
    assert [{u.speaker for u in p} for p in a] == [{u.speaker for u in p} for p in b]
    train, dev, held = split_by_speaker(_utts(2, 3))  # two voices cannot be split into three sides
    assert len(train) == 6 and not dev and not held


def test_shared_corpora_splits_by_role():
    if not CORPORA.exists():
        pytest.skip("../shared/corpora is not beside this checkout")
    splits = corpus_splits(CORPORA)
    for name, parts in splits.items():
        role = CORPUS_ROLES[name]
        if role == "speaker":
            sides = [{u.speaker for u in parts[k]} for k in ("train", "dev", "held")]
            assert not (sides[0] & sides[1]) and not (sides[0] & sides[2]) and not (sides[1] & sides[2]), name
            assert all(sides), name
        if role == "transcript":  # repeated sentences never straddle the split
            texts = [{" ".join(u.transcript.lower().split()) for u in parts[k]} for k in ("train", "held")]
            assert not (texts[0] & texts[1]), name
    assert set(splits.get("english-digits", {"language": []})) == {"language"}
    assert all(u.transcript and not u.words for u in splits.get("swahili-read", {}).get("letters", []))
