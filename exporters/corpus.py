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


def load_corpus(root: Path) -> list[Utterance]:
    root = Path(root)
    utts: dict[str, Utterance] = {}
    with open(root / "utterances.tsv", encoding="utf-8") as f:
        for r in csv.DictReader(f, delimiter="\t"):
            utts[r["utterance"]] = Utterance(r["utterance"], r["speaker"], r["transcript"],
                                             root / "audio" / f"{r['utterance']}.opus")
    with open(root / "words.tsv", encoding="utf-8") as f:
        for r in csv.DictReader(f, delimiter="\t"):
            u = utts.get(r["utterance"])
            if u is not None:
                u.words.append((float(r["start"]), float(r["end"]), word_type(r["word"])))
    return [u for u in utts.values() if u.words]


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
