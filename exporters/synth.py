"""Synthetic multilingual training speech from espeak-ng.

Pseudo-words are built from each language's letters (its own consonant and
vowel spellings, digraphs included) and spoken by espeak-ng with that
language's spelling rules, in several voice variants, rates and pitches. The
spelling encoder thus meets more than one orthography's letter-to-sound habits.

Words of the demo's lexicon (demo_broadcasts/vocabulary.txt) and of the real
corpus are never generated, so the demo stays unseen.
"""

from __future__ import annotations

import argparse
import os
import pickle
import shutil
import subprocess
import tempfile
import unicodedata
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np

# Spelling inventories: (consonant spellings, vowel spellings) per espeak-ng voice.
LANGUAGES: dict[str, tuple[list[str], list[str]]] = {
    "es": ("b c d f g j l ll m n ñ p r rr s t v z ch".split(), "a e i o u á é í ó ú".split()),
    "it": ("b c d f g l m n p r s t v z gn gl ch".split(), "a e i o u à è ò".split()),
    "pt": ("b d f g j l lh m n nh p r s t v x ch ç".split(), "a e i o u ã õ á ê ô".split()),
    "fr-fr": ("b d f g j l m n p r s t v ch gn".split(), "a e i o u é è ou au eu oi an on".split()),
    "de": ("b d f g h k l m n p r s t w z sch ch pf".split(), "a e i o u ä ö ü ei au ie".split()),
    "nl": ("b d f g h j k l m n p r s t v w z ch".split(), "a e i o u aa ee oo uu oe ij ui".split()),
    "pl": ("b c d f g h j k l ł m n p r s t w z sz cz rz ż ś dz".split(), "a e i o u y ą ę ó".split()),
    "cs": ("b c č d f h ch j k l m n ň p r ř s š t v z ž".split(), "a e i o u y á é í ú ů".split()),
    "tr": ("b c ç d f g ğ h j k l m n p r s ş t v y z".split(), "a e ı i o ö u ü".split()),
    "fi": ("h j k l m n p r s t v".split(), "a e i o u y ä ö aa ii uu".split()),
    "hu": ("b c cs d f g gy h j k l ly m n ny p r s sz t ty v z zs".split(), "a á e é i í o ó ö ő u ú ü".split()),
    "id": ("b c d f g h j k l m n ng ny p r s t w y".split(), "a e i o u".split()),
    "ro": ("b c d f g h j l m n p r s ș t ț v z ch".split(), "a e i o u ă â î".split()),
    "af": ("b d f g h j k l m n p r s t v w".split(), "a e i o u aa ee oo ie oe ê".split()),
    "et": ("h j k l m n p r s t v".split(), "a e i o u ä ö ü õ aa ee".split()),
}
# Voices recorded from real people, beside espeak-ng's own formant voices (engine, voice).
# MBROLA diphone databases (Debian non-free, through espeak-ng's mb-* voices: espeak-ng's
# spelling rules, the database's recorded diphones) and SVOX pico (Apache-2.0). The
# licence of each is listed in the model card (exporters/model_card.py, VOICE_LICENCES).
RECORDED: dict[str, list[tuple[str, str]]] = {
    "es": [("mbrola", "mb-es1"), ("mbrola", "mb-es2"), ("pico", "es-ES")],
    "it": [("mbrola", "mb-it3"), ("mbrola", "mb-it4"), ("pico", "it-IT")],
    "pt": [("mbrola", "mb-pt1"), ("mbrola", "mb-br1"), ("mbrola", "mb-br3")],
    "fr-fr": [("mbrola", "mb-fr1"), ("mbrola", "mb-fr4"), ("pico", "fr-FR")],
    "de": [("mbrola", "mb-de1"), ("mbrola", "mb-de2"), ("mbrola", "mb-de4"), ("mbrola", "mb-de6"), ("pico", "de-DE")],
    "nl": [("mbrola", "mb-nl2"), ("mbrola", "mb-nl3")],
    "pl": [("mbrola", "mb-pl1")],
    "cs": [("mbrola", "mb-cz1"), ("mbrola", "mb-cz2")],
    "tr": [("mbrola", "mb-tr1"), ("mbrola", "mb-tr2")],
    "hu": [("mbrola", "mb-hu1")],
    "id": [("mbrola", "mb-id1")],
    "ro": [("mbrola", "mb-ro1")],
    "af": [("mbrola", "mb-af1")],
    "et": [("mbrola", "mb-ee1")],
}
VARIANTS = ["m1", "m2", "m3", "m4", "m5", "m6", "m7", "f1", "f2", "f3", "f4", "f5", "klatt", "klatt2", "klatt3"]
SAMPLE_RATE = 16000


def plain(word: str) -> str:
    nfd = unicodedata.normalize("NFD", word.lower())
    return "".join(c for c in nfd if not unicodedata.combining(c))


def excluded_words(root: Path) -> set[str]:
    """Words never to generate: the demo lexicon and every shared corpus's words (marks removed)."""
    lexicon = root / "demo_broadcasts" / "vocabulary.txt"
    if not lexicon.exists():
        raise SystemExit(f"{lexicon} is missing: the demo's words must be known before synthesis")
    out = {plain(w) for w in lexicon.read_text(encoding="utf-8").split()}
    for words in sorted((root.parent / "shared" / "corpora").glob("*/words.tsv")):
        for line in words.read_text(encoding="utf-8").splitlines()[1:]:
            out.add(plain(line.split("\t")[-1]))
    return out


def pseudo_words(lang: str, n: int, rng: np.random.Generator, exclude: set[str]) -> list[str]:
    cons, vows = LANGUAGES[lang]
    simple = [c for c in cons if len(c) == 1]
    words: set[str] = set()
    while len(words) < n:
        syl = []
        for k in range(int(rng.integers(2, 5))):
            onset = "" if (k == 0 and rng.random() < 0.15) else cons[rng.integers(len(cons))]
            coda = simple[rng.integers(len(simple))] if rng.random() < 0.2 else ""
            syl.append(onset + vows[rng.integers(len(vows))] + coda)
        w = unicodedata.normalize("NFC", "".join(syl))
        if 4 <= len(plain(w)) <= 12 and plain(w) not in exclude:
            words.add(w)
    return sorted(words)


def available(engine: str, voice: str) -> bool:
    """Whether this machine can speak with the voice (MBROLA databases and pico are optional packages)."""
    if engine == "mbrola":
        return Path("/usr/share/mbrola", voice[3:]).exists()
    if engine == "pico":
        return shutil.which("pico2wave") is not None
    return shutil.which("espeak-ng") is not None


def speak(word: str, voice: str, rate: int, pitch: int) -> np.ndarray:
    """One word, trimmed, at 16 kHz. `voice` is an espeak-ng voice (mb-* included) or 'pico:LANG'."""
    import librosa
    import soundfile as sf

    with tempfile.NamedTemporaryFile(suffix=".wav") as tmp:
        if voice.startswith("pico:"):
            cmd = ["pico2wave", "-l", voice[5:], "-w", tmp.name, word]
        else:
            cmd = ["espeak-ng", "-v", voice, "-s", str(rate), "-p", str(pitch), "-w", tmp.name, word]
        subprocess.run(cmd, check=True, capture_output=True)
        x, sr = sf.read(tmp.name, dtype="float32")
    if x.ndim > 1:
        x = x.mean(axis=1)
    x = librosa.resample(x, orig_sr=sr, target_sr=SAMPLE_RATE)
    x, _ = librosa.effects.trim(x, top_db=35)
    return x


def plan(voice: str, words: list[str], renditions: int, rng: np.random.Generator) -> list[list[tuple]]:
    """Utterances of 3-6 words, each word `renditions` times; one voice, rate and pitch per utterance.

    Half the utterances (where the language has any) use a voice recorded from a real person.
    """
    recorded = [(e, v) for e, v in RECORDED.get(voice, []) if available(e, v)]
    groups = []
    for _ in range(renditions):
        order = rng.permutation(len(words))
        i = 0
        while i < len(order):
            size = int(rng.integers(3, 7))
            variant = f"{voice}+{VARIANTS[rng.integers(len(VARIANTS))]}"
            if recorded and rng.random() < 0.5:
                engine, name = recorded[rng.integers(len(recorded))]
                variant = name if engine == "mbrola" else f"pico:{name}"
            rate, pitch = int(rng.integers(120, 190)), int(rng.integers(30, 75))
            groups.append([(words[j], variant, rate, pitch) for j in order[i:i + size]])
            i += size
    return groups


def speak_groups(groups: list[list[tuple]]) -> list[list[np.ndarray]]:
    flat = [job for g in groups for job in g]
    with ThreadPoolExecutor(max_workers=2) as pool:
        clips = iter(list(pool.map(lambda j: speak(*j), flat)))
    return [[next(clips) for _ in g] for g in groups]


def join(words: list[str], clips: list[np.ndarray], rng: np.random.Generator) -> tuple[np.ndarray, list]:
    """Clips joined with short pauses (and silence around): the signal and its (start, end, word) times."""
    pieces = [np.zeros(int(rng.integers(3200, 8000)), np.float32)]
    t, times = len(pieces[0]), []
    for word, clip in zip(words, clips):
        times.append((t / SAMPLE_RATE, (t + len(clip)) / SAMPLE_RATE, word))
        gap = np.zeros(int(rng.integers(300, 3200)), np.float32)
        pieces += [clip, gap]
        t += len(clip) + len(gap)
    pieces.append(np.zeros(int(rng.integers(3200, 8000)), np.float32))
    audio = np.concatenate(pieces)
    return audio / max(1e-6, float(np.abs(audio).max())) * 0.7, times


def build(root: Path, words_per_language: int, renditions: int, seed: int, out: Path, languages=None) -> None:
    rng = np.random.default_rng(seed)
    exclude = excluded_words(root)
    groups, keys = [], []
    for lang in languages or LANGUAGES:
        g = plan(lang, pseudo_words(lang, words_per_language, rng, exclude), renditions, rng)
        groups += g
        keys += [(lang, k) for k in range(len(g))]
    clips = speak_groups(groups)
    utterances = []
    for (lang, k), g, c in zip(keys, groups, clips):
        audio, times = join([job[0] for job in g], c, rng)
        utterances.append({"id": f"syn-{lang}-{k}", "speaker": g[0][1], "lang": lang,
                           "audio": (audio * 32767).astype(np.int16), "words": times})
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.with_suffix(".tmp")
    with open(tmp, "wb") as f:
        pickle.dump(utterances, f)
    os.replace(tmp, out)
    hours = sum(len(u["audio"]) for u in utterances) / SAMPLE_RATE / 3600
    print(f"{len(utterances)} synthetic utterances, {sum(len(g) for g in groups)} words, {hours:.2f} h -> {out}")


if __name__ == "__main__":
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--words", type=int, default=300, help="pseudo-words per language")
    ap.add_argument("--renditions", type=int, default=3, help="voices per word")
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--out", type=Path, default=Path("runs/synth.pkl"))
    a = ap.parse_args()
    build(Path(__file__).resolve().parents[1], a.words, a.renditions, a.seed, a.out)
