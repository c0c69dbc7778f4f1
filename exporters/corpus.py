"""Corpora in the shared layout (utterances.tsv, words.tsv, audio/) and their validation split."""

from __future__ import annotations

import csv
import hashlib
import unicodedata
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

MAX_WORD_SECONDS = 2.0  # longer aligned "words" are alignment errors: left out of training


@dataclass
class Utterance:
    id: str
    speaker: str
    transcript: str
    audio_path: Path | None
    words: list[tuple[float, float, str]] = field(default_factory=list)
    lang: str = "corpus"
    audio: np.ndarray | None = None  # float32 at 16 kHz when already in memory


def word_type(w: str) -> str:
    return unicodedata.normalize("NFC", w.strip().lower())


def load_corpus(root: Path, require_words: bool = True) -> list[Utterance]:
    """Utterances of a corpus in the shared layout. With require_words, only those with word
    times (none for a corpus without words.tsv); otherwise every utterance, transcribed or not."""
    root = Path(root)
    utts: dict[str, Utterance] = {}
    with open(root / "utterances.tsv", encoding="utf-8") as f:
        for r in csv.DictReader(f, delimiter="\t"):
            utts[r["utterance"]] = Utterance(r["utterance"], r["speaker"], r["transcript"] or "",
                                             root / "audio" / f"{r['utterance']}.opus", lang=root.name)
    if (root / "words.tsv").exists():
        with open(root / "words.tsv", encoding="utf-8") as f:
            for r in csv.DictReader(f, delimiter="\t"):
                u = utts.get(r["utterance"])
                if u is not None:
                    u.words.append((float(r["start"]), float(r["end"]), word_type(r["word"])))
    return [u for u in utts.values() if u.words or not require_words]


# How each shared corpus serves training and measurement (exporters/train.py, the benchmarks):
# - "transcript": the speakers are all seen; utterances split by transcript (dev/held-out sentences);
# - "speaker": split by speaker: dev and held-out speakers are never heard in training;
# - "letters": transcripts without word times: the letter head's CTC training only;
# - "language": never trained on: the unseen-language test;
# - "channel": no transcripts: real broadcast babble, the unseen channel's noise source.
CORPUS_ROLES = {
    "mboshi": "transcript",
    "arabic-commands": "speaker",
    "arabic-emotions": "speaker",
    "swahili-read": "letters",
    "english-digits": "language",
    "urdu-broadcast": "channel",
}
SPEAKER_FRACTIONS = (0.1, 0.2)  # (dev, held-out) shares of a "speaker" corpus's speakers


def split_by_speaker(utts: list[Utterance], dev: float = SPEAKER_FRACTIONS[0], held: float = SPEAKER_FRACTIONS[1],
                     salt: str = "trawl-speakers-1"):
    """(train, dev, held) with every speaker on one side only.

    Deterministic: speakers are ordered by a salted hash of their id; the first `held` share
    (at least one) is held out, the next `dev` share (at least one) is the dev split.
    """
    speakers = sorted({u.speaker for u in utts}, key=lambda s: hashlib.sha256((salt + s).encode()).hexdigest())
    n_held = max(1, round(held * len(speakers))) if len(speakers) > 2 else 0
    n_dev = max(1, round(dev * len(speakers))) if len(speakers) > 2 else 0
    held_s, dev_s = set(speakers[:n_held]), set(speakers[n_held:n_held + n_dev])
    parts: tuple[list, list, list] = ([], [], [])
    for u in utts:
        parts[2 if u.speaker in held_s else 1 if u.speaker in dev_s else 0].append(u)
    return parts


def corpus_splits(corpora: Path, limit: int | None = None) -> dict[str, dict[str, list[Utterance]]]:
    """Every shared corpus present under `corpora`, split by its role: {name: {part: utterances}}.

    Parts: 'train', 'dev', 'held' (word-aligned ones), 'letters' (transcribed, for the letter
    head), 'language' and 'channel' (never trained on). `limit` keeps the first N utterances of
    each corpus (the quick run).
    """
    out: dict[str, dict[str, list[Utterance]]] = {}
    for name, role in CORPUS_ROLES.items():
        root = Path(corpora) / name
        if not (root / "utterances.tsv").exists():
            continue
        utts = load_corpus(root, require_words=role not in ("letters", "channel"))
        if limit:
            by_speaker: dict[str, list[Utterance]] = {}
            for u in utts:
                by_speaker.setdefault(u.speaker, []).append(u)
            per = max(1, limit // max(1, len(by_speaker)))
            utts = [u for us in by_speaker.values() for u in us[:per]][:max(limit, len(by_speaker))]
        if role == "transcript":
            train, held = split_by_transcript(utts, 0.1)
            train, dev = split_by_transcript(train, 0.05, salt="trawl-dev-1")
            out[name] = {"train": train, "dev": dev, "held": held}
        elif role == "speaker":
            train, dev, held = split_by_speaker(utts)
            out[name] = {"train": train, "dev": dev, "held": held}
        elif role == "letters":
            out[name] = {"letters": [u for u in utts if u.transcript.strip()]}
        else:
            out[name] = {role: utts}
    return out


def split_by_transcript(utts: list[Utterance], fraction: float = 0.1, salt: str = "trawl-split-1"):
    """Held-out split grouping utterances by transcript (repeated sentences never straddle it).

    Deterministic: an utterance is held out when the hash of its normalised transcript falls in
    the lowest `fraction` of the hash range.
    """
    train, held = [], []
    for u in utts:
        key = unicodedata.normalize("NFC", " ".join(u.transcript.lower().split()))
        h = int(hashlib.sha256((salt + key).encode()).hexdigest()[:8], 16) / 0xFFFFFFFF
        (held if h < fraction else train).append(u)
    return train, held


def load_audio(u: Utterance) -> np.ndarray:
    if u.audio is not None:
        return u.audio
    import librosa
    import soundfile as sf

    x, sr = sf.read(str(u.audio_path), dtype="float32", always_2d=True)
    x = x.mean(axis=1)
    if sr != 16000:
        x = librosa.resample(x, orig_sr=sr, target_sr=16000)
    return x
