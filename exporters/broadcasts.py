"""Broadcasts built from corpus utterances the models never trained on, for the search benchmarks
(held-out split) and for fitting search settings (dev split, exporters/fit_rescoring.py).

The held-out utterances are those of ``split_by_transcript(load_corpus(corpus), 0.1)[1]``:
never seen in training. They are shuffled (seeded) and joined, with pauses of 0.3-1.0 s,
into broadcasts of about ``broadcast_minutes`` each, written in two conditions with the same
speech and the same timings:

    OUT/clean/heldout_NNN.wav   the joined utterances
    OUT/radio/heldout_NNN.wav   a music bed at 15 dB SNR under the whole broadcast,
                                band-limited to 300-3400 Hz, noise at 35 dB SNR,
                                then (unless --no-opus) an Opus round trip
    OUT/reference.tsv           broadcast, start, end, word (broadcast relative to the condition folder)
    OUT/terms.tsv               term, split, occurrences
    OUT/manifest.json           the parameters and the utterances of each broadcast

Terms are the word types of at least MIN_LETTERS letters that occur in the built broadcasts;
``seen`` when the type occurs in the training utterances (every corpus utterance not held
out), else ``unseen``. Aligned words longer than MAX_WORD_SECONDS are alignment errors: a
type with such a token is left out of the terms (its timing cannot be trusted), while the
reference keeps every word as transcribed.

    python -m exporters.broadcasts OUT [--minutes-total M] [--seed S]
"""

from __future__ import annotations

import argparse
import csv
import io
import json
import sys
from collections import Counter
from pathlib import Path

import numpy as np
import soundfile as sf

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from detector.spelling import letter_count  # noqa: E402
from exporters.augment import SR, band_limit, coloured_noise, mix, music_bed  # noqa: E402
from exporters.corpus import MAX_WORD_SECONDS, load_audio, load_corpus, split_by_transcript  # noqa: E402

DEFAULT_CORPUS = ROOT.parent / "shared" / "corpora" / "mboshi"
HELD_OUT_FRACTION = 0.1
DEV_FRACTION, DEV_SALT = 0.05, "trawl-dev-1"  # as exporters/train.py
MIN_LETTERS = 6
PAUSE_SECONDS = (0.3, 1.0)
MUSIC_SNR_DB = 15.0
NOISE_SNR_DB = 35.0
BAND_HZ = (300.0, 3400.0)


def utterance_seconds(u) -> float:
    return sf.info(str(u.audio_path)).duration if u.audio is None else len(u.audio) / SR


def choose_utterances(held, minutes_total: float | None, rng) -> list:
    """The held-out utterances in a seeded order, cut after `minutes_total` minutes of speech."""
    order = [held[i] for i in rng.permutation(len(held))]
    if minutes_total is None:
        return order
    chosen, total = [], 0.0
    for u in order:
        if total >= minutes_total * 60:
            break
        chosen.append(u)
        total += utterance_seconds(u)
    return chosen


def group(utts, broadcast_minutes: float) -> list[list]:
    """Consecutive groups of about `broadcast_minutes` of speech each."""
    secs = np.array([utterance_seconds(u) for u in utts])
    n = max(1, int(round(secs.sum() / (broadcast_minutes * 60))))
    before = np.cumsum(secs) - secs
    which = np.minimum((before / secs.sum() * n).astype(int), n - 1)
    return [[u for u, w in zip(utts, which) if w == b] for b in range(n)]


def join(utts, rng) -> tuple[np.ndarray, list[tuple[float, float, str]], list[tuple[str, float]]]:
    """Audio of the utterances with random pauses between (and around) them, and the word timings."""
    pieces, words, placed = [], [], []
    pos = 0
    for u in utts:
        gap = np.zeros(int(rng.uniform(*PAUSE_SECONDS) * SR), np.float32)
        pieces.append(gap)
        pos += len(gap)
        x = load_audio(u).astype(np.float32)
        offset = pos / SR
        placed.append((u.id, round(offset, 3)))
        words += [(offset + s, offset + e, w) for s, e, w in u.words]
        pieces.append(x)
        pos += len(x)
    pieces.append(np.zeros(int(rng.uniform(*PAUSE_SECONDS) * SR), np.float32))
    return np.concatenate(pieces), words, placed


def opus_round_trip(x: np.ndarray) -> np.ndarray:
    buf = io.BytesIO()
    sf.write(buf, np.clip(x, -1, 1), SR, format="OGG", subtype="OPUS")
    buf.seek(0)
    y, _ = sf.read(buf, dtype="float32")
    return y[: len(x)] if len(y) >= len(x) else np.pad(y, (0, len(x) - len(y)))


def radio(x: np.ndarray, rng, opus: bool = True) -> np.ndarray:
    """Talk over a music bed, through a 300-3400 Hz channel, with light noise."""
    y = mix(x, music_bed(len(x), rng), MUSIC_SNR_DB)
    y = band_limit(y, *BAND_HZ)
    y = mix(y, coloured_noise(len(y), rng, slope=-1.0), NOISE_SNR_DB)
    y *= np.sqrt(np.mean(x**2) / (np.mean(y**2) + 1e-12))  # the clean signal's loudness
    peak = np.abs(y).max()
    if peak > 0.99:
        y *= 0.99 / peak
    return opus_round_trip(y) if opus else y


def term_table(words, train_types: set[str], min_letters: int = MIN_LETTERS) -> list[tuple[str, str, int]]:
    """(term, seen/unseen, occurrences) of the long-enough types with trustworthy timings."""
    counts = Counter(w for _, s, e, w in words)
    too_long = {w for _, s, e, w in words if e - s > MAX_WORD_SECONDS}
    rows = [(w, "seen" if w in train_types else "unseen", n) for w, n in counts.items()
            if letter_count(w) >= min_letters and w not in too_long]
    return sorted(rows, key=lambda r: (-r[2], r[0]))


def build(out: Path, corpus: Path = DEFAULT_CORPUS, minutes_total: float | None = None, seed: int = 0,
          broadcast_minutes: float = 5.0, opus: bool = True, split: str = "heldout", utterances: list | None = None,
          train_types: set[str] | None = None, channel=None, min_letters: int = MIN_LETTERS) -> dict:
    """Write the broadcasts, reference and terms under `out`; returns the manifest.

    split "heldout": the held-out utterances (benchmarks); "dev": the training run's dev
    utterances (for fitting search settings, never the held-out ones). `utterances` (with
    `train_types`, the word types training saw) replaces the corpus split: another corpus's
    held-out speakers, say. `channel(x, rng)` replaces the radio-like condition's chain."""
    out = Path(out)
    if utterances is not None:
        train, held = [], list(utterances)
    else:
        train, held = split_by_transcript(load_corpus(corpus), HELD_OUT_FRACTION)
        if split == "dev":
            train, held = split_by_transcript(train, DEV_FRACTION, salt=DEV_SALT)
        elif split != "heldout":
            raise ValueError(f"unknown split {split!r}")
    rng = np.random.default_rng(seed)
    groups = group(choose_utterances(held, minutes_total, rng), broadcast_minutes)
    for cond in ("clean", "radio"):
        (out / cond).mkdir(parents=True, exist_ok=True)
    words, broadcasts = [], []
    for b, utts in enumerate(groups):
        name = f"heldout_{b:03d}.wav"
        x, ws, placed = join(utts, rng)
        sf.write(str(out / "clean" / name), np.clip(x, -1, 1), SR, subtype="PCM_16")
        y = radio(x, rng, opus) if channel is None else channel(x, rng)
        sf.write(str(out / "radio" / name), np.clip(y, -1, 1), SR, subtype="PCM_16")
        words += [(name, s, e, w) for s, e, w in ws]
        broadcasts.append({"broadcast": name, "seconds": round(len(x) / SR, 3), "utterances": placed})
    with open(out / "reference.tsv", "w", encoding="utf-8", newline="") as f:
        w = csv.writer(f, delimiter="\t", lineterminator="\n")
        w.writerow(["broadcast", "start", "end", "word"])
        w.writerows((b, f"{s:.3f}", f"{e:.3f}", word) for b, s, e, word in words)
    if train_types is None:
        train_types = {w for u in train for _, _, w in u.words}
    terms = term_table(words, train_types, min_letters)
    with open(out / "terms.tsv", "w", encoding="utf-8", newline="") as f:
        w = csv.writer(f, delimiter="\t", lineterminator="\n")
        w.writerow(["term", "split", "occurrences"])
        w.writerows(terms)
    manifest = {"corpus": str(Path(corpus).resolve()), "minutes_total": minutes_total, "seed": seed,
                "broadcast_minutes": broadcast_minutes, "opus": opus, "split": split, "held_out_utterances": len(held),
                "used_utterances": sum(len(g) for g in groups), "broadcasts": broadcasts,
                "terms": len(terms), "seen_terms": sum(r[1] == "seen" for r in terms)}
    (out / "manifest.json").write_text(json.dumps(manifest, indent=1, ensure_ascii=False) + "\n", encoding="utf-8")
    return manifest


def read_terms(path: Path) -> list[tuple[str, str, int]]:
    with open(path, encoding="utf-8") as f:
        return [(r["term"], r["split"], int(r["occurrences"])) for r in csv.DictReader(f, delimiter="\t")]


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("out", type=Path)
    ap.add_argument("--corpus", type=Path, default=DEFAULT_CORPUS)
    ap.add_argument("--minutes-total", type=float, default=None, help="minutes of speech (default: all held-out audio)")
    ap.add_argument("--broadcast-minutes", type=float, default=5.0)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--no-opus", action="store_true", help="skip the Opus round trip of the radio condition")
    a = ap.parse_args(argv)
    m = build(a.out, a.corpus, a.minutes_total, a.seed, a.broadcast_minutes, not a.no_opus)
    total = sum(b["seconds"] for b in m["broadcasts"])
    print(f"{len(m['broadcasts'])} broadcasts, {total / 60:.1f} min, {m['used_utterances']} of "
          f"{m['held_out_utterances']} held-out utterances; {m['terms']} terms ({m['seen_terms']} seen) -> {a.out}")


if __name__ == "__main__":
    main()
