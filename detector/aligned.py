"""A word-aligned corpus in the shared layout, read for `trawl adapt --aligned`.

    CORPUS_DIR/utterances.tsv   tab-separated, header row, columns include: utterance
    CORPUS_DIR/words.tsv        tab-separated, header row: utterance, start, end, word (seconds)
    CORPUS_DIR/audio/UTTERANCE.{opus,wav,flac,mp3,ogg}

Each aligned word is a known occurrence of its spelling: to the adaptation it is one more
confirmed hit, from audio outside the archive.
"""

from __future__ import annotations

import csv
from dataclasses import dataclass
from pathlib import Path

from . import TrawlError
from .spelling import letters, word_type

AUDIO_SUFFIXES = (".opus", ".wav", ".flac", ".mp3", ".ogg")
MAX_WORD_SECONDS = 2.0  # longer aligned "words" are alignment errors


@dataclass
class AlignedRecording:
    audio: Path
    words: list[tuple[float, float, str]]  # (start, end, word type)


def _rows(path: Path, needed: tuple[str, ...]) -> list[dict]:
    try:
        with open(path, encoding="utf-8", newline="") as f:
            reader = csv.DictReader(f, delimiter="\t")
            missing = [c for c in needed if c not in (reader.fieldnames or [])]
            if missing:
                raise TrawlError(f"{path}: no column {', '.join(missing)} in the header row")
            return list(reader)
    except FileNotFoundError:
        raise TrawlError(f"{path} not found: an aligned corpus has utterances.tsv, words.tsv and audio/") from None
    except UnicodeDecodeError:
        raise TrawlError(f"{path} is not UTF-8 text") from None


def read_aligned(root: Path | str) -> list[AlignedRecording]:
    """The corpus's recordings with their aligned words (words without letters, or longer
    than MAX_WORD_SECONDS, are left out); a TrawlError names what is missing."""
    root = Path(root)
    if not root.is_dir():
        raise TrawlError(f"aligned corpus {str(root)!r} is not a folder")
    utts = [r["utterance"] for r in _rows(root / "utterances.tsv", ("utterance",))]
    words: dict[str, list[tuple[float, float, str]]] = {u: [] for u in utts}
    for line, r in enumerate(_rows(root / "words.tsv", ("utterance", "start", "end", "word")), start=2):
        if r["utterance"] not in words:
            continue
        try:
            s, e = float(r["start"]), float(r["end"])
        except ValueError:
            raise TrawlError(f"{root / 'words.tsv'}, line {line}: start and end must be seconds") from None
        w = word_type(r["word"] or "")
        if letters(w) and 0 <= s < e and e - s <= MAX_WORD_SECONDS:
            words[r["utterance"]].append((s, e, w))
    out = []
    for u in utts:
        if not words[u]:
            continue
        audio = next((root / "audio" / f"{u}{x}" for x in AUDIO_SUFFIXES if (root / "audio" / f"{u}{x}").exists()), None)
        if audio is None:
            raise TrawlError(f"{root / 'audio'}: no audio file for utterance {u!r}")
        out.append(AlignedRecording(audio, words[u]))
    if not out:
        raise TrawlError(f"{root}: no aligned word with letters found")
    return out
