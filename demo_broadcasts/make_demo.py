#!/usr/bin/env python3
"""Build the bundled Trawl demo archive: synthetic broadcasts of Radio Nukalé.

Everything here is invented: the station, its programmes, the people and
places, and the language (Tofekan), whose words are generated from a seed.
The audio is made with espeak-ng (voice ``es`` and its variants), synthetic
music and noise, and stored as Ogg/Opus.  Word timings are exact because
every word is synthesised separately and placed on the timeline by this
script.

Usage:  python demo_broadcasts/make_demo.py   (from anywhere)
"""
from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import unicodedata
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
LEXICON_FILE = HERE / "vocabulary.txt"
CORPUS_WORDS = HERE.parent.parent / "shared" / "corpora" / "mboshi" / "words.tsv"
LEXICON_SEED = 20240611
AUDIO_SEED = 77031
SR = 16000


# --------------------------------------------------------------------------
# The Tofekan language: a regular, phonemic spelling, syllables CV and CVC.
# Onsets p t k b d m n l r s f j y ch; vowels a e i o u; codas n l s.
# Stress is on the last-but-one syllable unless an acute accent marks the
# final vowel.  Letters that Spanish rules read irregularly (c, g, h, q, v,
# w, x, z) are not used, so espeak-ng's ``es`` voice reads every word as it
# is spelled.
# --------------------------------------------------------------------------
ONSETS = ["p", "t", "k", "b", "d", "m", "n", "l", "r", "s", "f", "j", "y", "ch"]
ONSET_W = [8, 9, 9, 6, 6, 8, 8, 8, 5, 8, 4, 4, 3, 3]
VOWELS = ["a", "e", "i", "o", "u"]
VOWEL_W = [10, 7, 7, 7, 5]
CODAS = ["n", "l", "s"]
ACUTE = {"a": "á", "e": "é", "i": "í", "o": "ó", "u": "ú"}

# Words an archivist would not want in an invented demo (real names and
# common words that the random syllables can produce).
AVOID = {
    "toledo", "samoa", "malibu", "managua", "lisboa", "kanada", "kenia",
    "bolivia", "panama", "manila", "lima", "roma", "paris", "berlin",
    "madrid", "moskva", "milano", "napoli", "sudan", "salerno", "tokio",
    "osaka", "kobe", "lagos", "dakar", "bamako", "kinshasa", "nairobi",
    "maputo", "luanda", "lusaka", "kampala", "kigali", "bujumbura",
    "dodoma", "harare", "mombasa", "tanga", "kumasi", "ibadan", "kano",
    "benin", "togo", "mali", "niger", "chad", "libia", "peru", "chile",
    "kuba", "tonga", "fiji", "nauru", "palau", "tuvalu", "kiribati",
    "borneo", "java", "sumatra", "bali", "timor", "luson", "mindanao",
    "tibet", "nepal", "butan", "lasa", "delhi", "mumbai", "kolkata",
    "karachi", "lahore", "kabul", "teheran", "bagdad", "damasko",
    "beirut", "amman", "riad", "doha", "dubai", "masakre", "salami",
    "banana", "papaya", "tomate", "patata", "pelota", "maleta", "paloma",
    "camino", "kamino", "madera", "bonita", "pepita", "lolita", "rosita",
    "marina", "ramona", "simona", "fabiola", "daniela", "sofia", "lukas",
    "mateo", "tomas", "nikolas", "samuel", "manuel", "miguel", "pablo",
    "pedro", "ramon", "simon", "marta", "rita", "nina", "dina", "lola",
    "lulu", "mimi", "kiki", "bobo", "pipi", "popo", "kaka", "puta", "puto",
    "mierda", "kulo", "pene", "teta", "nalga", "sexo", "muerte", "mata",
    "matar", "mato", "asesino", "bomba", "sida", "nazi", "todo", "moja",
    "dura", "testa", "sesta", "mesa", "pato", "gato", "casa", "kasa", "kosa",
    "nita", "beni", "sofa", "mano", "sera", "nima", "nila", "mila", "tina",
    "lina", "sara", "sami", "kofi", "nana", "papa", "mama", "tata", "mimi",
    "pune", "jada", "ben", "yolo", "mile", "noda", "yoma", "dis", "kan", "pon",
    "lokono", "kuki", "bena", "ken", "len", "late", "pikin", "chirano", "lis",
}


def strip_marks(word: str) -> str:
    """NFC, lower case, combining marks removed (the comparison form)."""
    w = unicodedata.normalize("NFD", word.lower())
    w = "".join(c for c in w if not unicodedata.combining(c))
    return unicodedata.normalize("NFC", w)


def load_corpus_words(path: Path = CORPUS_WORDS) -> set[str]:
    words = set()
    with open(path, encoding="utf-8") as fh:
        header = fh.readline().rstrip("\n").split("\t")
        col = header.index("word") if "word" in header else len(header) - 1
        for line in fh:
            parts = line.rstrip("\n").split("\t")
            if len(parts) > col and parts[col]:
                words.add(strip_marks(parts[col]))
    return words


def _edit_distance(a: str, b: str) -> int:
    prev = list(range(len(b) + 1))
    for i, ca in enumerate(a, 1):
        cur = [i]
        for j, cb in enumerate(b, 1):
            cur.append(min(prev[j] + 1, cur[j - 1] + 1, prev[j - 1] + (ca != cb)))
        prev = cur
    return prev[-1]


class _WordMaker:
    def __init__(self, rng: np.random.Generator, banned: set[str]):
        self.rng = rng
        self.banned = banned
        self.used: set[str] = set()
        ow = np.array(ONSET_W, float)
        vw = np.array(VOWEL_W, float)
        self.ow = ow / ow.sum()
        self.vw = vw / vw.sum()

    def syllable(self, coda_p: float, first: bool, prev_coda: str) -> tuple[str, str]:
        while True:
            on = ONSETS[self.rng.choice(len(ONSETS), p=self.ow)]
            if on == prev_coda:            # no "nn", "ll", "ss"
                continue
            if first and on == "r":        # word-initial r is rare in Tofekan
                continue
            v = VOWELS[self.rng.choice(len(VOWELS), p=self.vw)]
            if on == "y" and v == "i":
                continue
            coda = CODAS[self.rng.integers(len(CODAS))] if self.rng.random() < coda_p else ""
            return on + v + coda, coda

    def word(self, n_syll: int, coda_p: float, min_len: int, max_len: int,
             accent_p: float = 0.0) -> str:
        for _ in range(10000):
            parts, prev = [], ""
            for k in range(n_syll):
                s, prev = self.syllable(coda_p, k == 0, prev)
                parts.append(s)
            w = "".join(parts)
            if not (min_len <= len(w) <= max_len):
                continue
            if n_syll >= 2 and w[-1] in ACUTE and self.rng.random() < accent_p:
                w = w[:-1] + ACUTE[w[-1]]
            key = strip_marks(w)
            if key in self.banned or key in AVOID or key in {strip_marks(u) for u in self.used}:
                continue
            self.used.add(w)
            return w
        raise RuntimeError("could not make a new word")


def build_lexicon(corpus_words: set[str]) -> dict[str, list[str]]:
    """The Tofekan vocabulary by word class, generated from LEXICON_SEED."""
    rng = np.random.default_rng(LEXICON_SEED)
    mk = _WordMaker(rng, corpus_words)
    lex: dict[str, list[str]] = {}
    # search terms: names of invented places, people and topics, 6-10 letters
    names: list[str] = []
    while len(names) < 22:
        n_syll = int(rng.choice([3, 3, 4, 4]))
        w = mk.word(n_syll, 0.3, 6, 10, accent_p=0.25)
        if any(_edit_distance(strip_marks(w), strip_marks(o)) < 3 for o in names):
            mk.used.discard(w)
            continue
        names.append(w)
    lex["name"] = names
    lex["func"] = [mk.word(1, 0.35, 2, 3) for _ in range(26)] + \
                  [mk.word(2, 0.0, 4, 4) for _ in range(8)]
    lex["noun"] = [mk.word(int(rng.choice([2, 2, 3])), 0.25, 4, 8, 0.15) for _ in range(64)]
    lex["verb"] = [mk.word(int(rng.choice([2, 2, 3])), 0.3, 4, 8, 0.3) for _ in range(38)]
    lex["adj"] = [mk.word(2, 0.2, 4, 6, 0.1) for _ in range(22)]
    lex["num"] = [mk.word(int(rng.choice([1, 2])), 0.3, 3, 6) for _ in range(12)]
    return lex


def lexicon_words(lex: dict[str, list[str]]) -> list[str]:
    return [w for cls in ("name", "func", "noun", "verb", "adj", "num") for w in lex[cls]]


def ensure_lexicon(corpus_words: set[str], allow_create: bool) -> dict[str, list[str]]:
    """Build the lexicon, compare with vocabulary.txt (write it if absent), and
    abort if any word occurs in the training corpus."""
    lex = build_lexicon(corpus_words)
    words = lexicon_words(lex)
    if LEXICON_FILE.exists():
        on_disk = [l.strip() for l in LEXICON_FILE.read_text(encoding="utf-8").splitlines() if l.strip()]
        if on_disk != words:
            sys.exit("vocabulary.txt differs from the seeded generator; the lexicon is frozen "
                     "(the training generator excludes it), so restore vocabulary.txt or the generator.")
    elif allow_create:
        LEXICON_FILE.write_text("\n".join(words) + "\n", encoding="utf-8")
        print(f"wrote {LEXICON_FILE} ({len(words)} words)")
    else:
        sys.exit("vocabulary.txt is missing")
    clash = sorted(w for w in words if strip_marks(w) in corpus_words)
    if clash:
        sys.exit(f"lexicon words found in the training corpus: {clash}")
    return lex


# --------------------------------------------------------------------------
# Speakers and programmes
# --------------------------------------------------------------------------
# id: (espeak-ng voice, rate in words/min, base pitch 0-99)
SPEAKERS = {
    "news_a": ("es+m3", 160, 42),
    "news_b": ("es+f2", 152, 60),
    "notices": ("es+f4", 145, 55),
    "host": ("es+m1", 165, 47),
    "caller_a": ("es+m7", 138, 40),
    "caller_b": ("es+f5", 150, 66),
    "caller_c": ("es+klatt", 170, 50),
    "caller_d": ("es+m4", 134, 57),
    "caller_e": ("es+f1", 157, 65),
    "dj_a": ("es+m2", 172, 52),
    "dj_b": ("es+f3", 166, 62),
}

# (path relative to demo_broadcasts, kind, target minutes, speakers)
BROADCASTS = [
    ("news/morning-bulletin-01.opus", "news", 4.6, ["news_a", "news_b"]),
    ("news/evening-bulletin-02.opus", "news", 4.0, ["news_b", "news_a"]),
    ("notices/community-notices-01.opus", "notices", 4.2, ["notices"]),
    ("phone-in/open-line-01.opus", "phone", 6.4, ["host", "caller_a", "caller_b", "caller_c"]),
    ("phone-in/open-line-02.opus", "phone", 5.4, ["host", "caller_d", "caller_e"]),
    ("music-hour/saturday-music-hour-01.opus", "music", 7.0, ["dj_a"]),
    ("music-hour/saturday-music-hour-02.opus", "music", 6.2, ["dj_b"]),
]

SPEECH_RMS = 0.1          # -20 dBFS for a sentence's voiced part before item gain
JINGLE_RMS = 0.056        # about -25 dBFS
SONG_RMS = 0.075          # music-only stretches of the music hour


# --------------------------------------------------------------------------
# Text: sentences of 4-12 words
# --------------------------------------------------------------------------
def _zipf(n: int, s: float = 1.0) -> np.ndarray:
    p = 1.0 / (np.arange(n) + 2.0) ** s
    return p / p.sum()


class SentenceMaker:
    def __init__(self, lex: dict[str, list[str]], rng: np.random.Generator):
        self.lex, self.rng = lex, rng
        self.p = {k: _zipf(len(v), 0.9 if k != "func" else 1.2) for k, v in lex.items()}

    def pick(self, cls: str) -> str:
        words = self.lex[cls]
        return words[self.rng.choice(len(words), p=self.p[cls])]

    def noun_phrase(self) -> list[str]:
        r = self.rng.random()
        if r < 0.45:
            out = [self.pick("func"), self.pick("noun")]
        elif r < 0.75:
            out = [self.pick("noun")]
        else:
            out = [self.pick("num"), self.pick("noun")]
        if self.rng.random() < 0.35:
            out.append(self.pick("adj"))
        return out

    def sentence(self) -> list[str]:
        n = int(self.rng.integers(4, 13))
        words = self.noun_phrase() + [self.pick("verb")] + self.noun_phrase()
        while len(words) < n:
            if self.rng.random() < 0.3:
                words += [self.pick("func"), self.pick("verb")]
            else:
                words += [self.pick("func")] + self.noun_phrase()
        return words[:n]


def _est_seconds(words: list[str], speaker: str, cache: dict) -> float:
    voice, rate, pitch = SPEAKERS[speaker]
    n = len(words)
    return sum(len(cache[(w, voice, rate, _pitch_for(pitch, i, n))]) for i, w in enumerate(words)) / SR \
        + 0.1 * (n - 1) + 0.55


# An item is a dict: {"type": "speech"|"jingle"|"song"|"pause", ...}
def plan_broadcast(kind: str, minutes: float, spk: list[str], sm: SentenceMaker,
                   rng: np.random.Generator, cache: dict) -> list[dict]:
    target = minutes * 60.0
    items: list[dict] = []
    t = 0.0

    def speech(speaker: str, n_sent: int, channel: str = "studio") -> dict:
        sents = [sm.sentence() for _ in range(n_sent)]
        return {"type": "speech", "speaker": speaker, "channel": channel,
                "sentences": sents, "est": sum(_est_seconds(s, speaker, cache) for s in sents)}

    def add(item: dict, est: float) -> None:
        nonlocal t
        items.append(item)
        t += est

    add({"type": "jingle", "dur": float(rng.uniform(4.0, 6.0))}, 5.0)
    if kind in ("news", "notices"):
        k = 0
        while t < target - 25:
            it = speech(spk[k % len(spk)], int(rng.integers(3, 7)))
            add(it, it["est"])
            k += 1
            if rng.random() < 0.45 and t < target - 40:
                add({"type": "jingle", "dur": float(rng.uniform(3.0, 4.5))}, 3.7)
            else:
                d = float(rng.uniform(0.9, 1.8))
                add({"type": "pause", "dur": d}, d)
    elif kind == "phone":
        host, callers = spk[0], spk[1:]
        it = speech(host, int(rng.integers(3, 5)))
        add(it, it["est"])
        per_call = (target - 20 - t) / len(callers)
        for c in callers:
            t_end = t + per_call
            add({"type": "pause", "dur": 0.8}, 0.8)
            while t < t_end - 10:
                it = speech(host, int(rng.integers(1, 3)))
                add(it, it["est"])
                d = float(rng.uniform(0.25, 0.6))
                add({"type": "pause", "dur": d}, d)
                it = speech(c, int(rng.integers(2, 6)), channel="phone")
                add(it, it["est"])
                d = float(rng.uniform(0.25, 0.6))
                add({"type": "pause", "dur": d}, d)
            add({"type": "jingle", "dur": float(rng.uniform(3.0, 4.0))}, 3.5)
        it = speech(host, 2)
        add(it, it["est"])
    elif kind == "music":
        n_songs = 3 if minutes < 6.5 else 4
        song_durs = [float(rng.uniform(20.0, 40.0)) for _ in range(n_songs)]
        talk_total = target - 5 - sum(song_durs) - 8 - 5
        add({"type": "song", "dur": float(rng.uniform(6.0, 9.0))}, 7.5)   # intro of the bed
        for i in range(n_songs + 1):
            t_end = t + talk_total / (n_songs + 1)
            while t < t_end - 8:
                it = speech(spk[0], int(rng.integers(3, 6)), channel="bed")
                add(it, it["est"])
                d = float(rng.uniform(0.6, 1.2))
                add({"type": "pause", "dur": d, "bed": True}, d)
            if i < n_songs:
                add({"type": "song", "dur": song_durs[i]}, song_durs[i])
    add({"type": "pause", "dur": 0.6}, 0.6)
    add({"type": "jingle", "dur": float(rng.uniform(4.0, 6.0))}, 5.0)
    return items


def place_names(plans: list[list[dict]], names: list[str], rng: np.random.Generator) -> dict[str, int]:
    """Insert each search-term name 3-8 times, spread over broadcasts, at
    the start, middle or end of sentences."""
    slots = [(b, i, s) for b, plan in enumerate(plans) for i, it in enumerate(plan)
             if it["type"] == "speech" for s in range(len(it["sentences"]))]
    by_bc: dict[int, list[tuple[int, int, int]]] = {}
    for sl in slots:
        by_bc.setdefault(sl[0], []).append(sl)
    used: dict[tuple[int, int, int], int] = {}
    counts = {}
    for name in names:
        c = int(rng.integers(3, 9))
        counts[name] = c
        bcs = rng.permutation(len(plans))
        chosen = []
        k = 0
        while len(chosen) < c:
            cand = by_bc[int(bcs[k % len(bcs)])]
            sl = cand[int(rng.integers(len(cand)))]
            k += 1
            if used.get(sl, 0) >= 2 or sl in chosen:
                continue
            chosen.append(sl)
        for sl in chosen:
            used[sl] = used.get(sl, 0) + 1
            b, i, s = sl
            sent = plans[b][i]["sentences"][s]
            if len(sent) >= 12:
                del sent[int(rng.integers(1, len(sent) - 1))]
            where = rng.random()
            if where < 0.3:
                pos = 0
            elif where < 0.6:
                pos = len(sent)
            else:
                pos = int(rng.integers(1, len(sent)))
            sent.insert(pos, name)
    return counts


# --------------------------------------------------------------------------
# Speech synthesis: one espeak-ng call per (word, voice, rate, pitch)
# --------------------------------------------------------------------------
def _pitch_for(base: int, i: int, n: int) -> int:
    """A falling declination over the sentence in three steps of 4."""
    if n <= 1:
        return base
    frac = i / (n - 1)
    return base + (4 if frac < 0.34 else (0 if frac < 0.67 else -4))


def trim_silence(x: np.ndarray, sr: int = SR, rel_db: float = 42.0) -> np.ndarray:
    hop = sr // 200                                   # 5 ms
    n = len(x) // hop
    if n == 0:
        return x
    e = np.sqrt(np.mean(x[: n * hop].reshape(n, hop) ** 2, axis=1) + 1e-12)
    thr = max(e.max() * 10 ** (-rel_db / 20), 1e-4)
    on = np.nonzero(e > thr)[0]
    if len(on) == 0:
        return x[:0]
    a = max(0, on[0] * hop - hop)
    b = min(len(x), (on[-1] + 1) * hop + hop)
    return x[a:b]


def _split_on_pauses(x: np.ndarray, min_pause: float = 0.3, rel_db: float = 50.0):
    """(start, end) sample spans of the sounds between pauses >= min_pause."""
    hop = SR // 100
    n = len(x) // hop
    e = np.sqrt(np.mean(x[: n * hop].reshape(n, hop) ** 2, axis=1) + 1e-12)
    active = e > max(e.max() * 10 ** (-rel_db / 20), 1e-4)
    spans, start, last, quiet = [], None, 0, 0
    need = int(min_pause * 100)
    for k, a in enumerate(active):
        if a:
            if start is None:
                start = k
            last, quiet = k, 0
        elif start is not None:
            quiet += 1
            if quiet >= need:
                spans.append((start * hop, (last + 1) * hop))
                start, quiet = None, 0
    if start is not None:
        spans.append((start * hop, (last + 1) * hop))
    return spans


def _espeak(text: str, voice: str, rate: int, pitch: int, path: str, ssml: bool) -> np.ndarray:
    from scipy.signal import resample_poly
    import soundfile as sf

    cmd = ["espeak-ng"] + (["-m"] if ssml else []) + \
          ["-v", voice, "-s", str(rate), "-p", str(pitch), "-w", path, text]
    subprocess.run(cmd, check=True, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    x, sr = sf.read(path, dtype="float32")
    os.unlink(path)
    if sr != SR:
        g = int(np.gcd(SR, sr))
        x = resample_poly(x, SR // g, sr // g).astype(np.float32)
    return x


def synthesise(words: list[str], settings: list[tuple[str, int, int]], workers: int = 2) -> dict:
    """Every word in every (voice, rate, pitch) setting.  Each setting is one
    espeak-ng call: the words as one-word sentences with 500 ms breaks
    between them, cut apart at the pauses.  A setting whose pieces do not
    match the word count falls back to one call per word.  Each word's audio
    is trimmed of leading and trailing silence."""
    out: dict = {}
    with tempfile.TemporaryDirectory(prefix="trawl-demo-") as tmp:
        def one(job):
            idx, (voice, rate, pitch) = job
            path = os.path.join(tmp, f"{idx}.wav")
            ssml = "<speak>" + " ".join(f'{w}. <break time="500ms"/>' for w in words) + "</speak>"
            x = _espeak(ssml, voice, rate, pitch, path, ssml=True)
            spans = _split_on_pauses(x)
            if len(spans) == len(words):
                pieces = [x[max(0, a - 160):b + 160] for a, b in spans]
                fallback = False
            else:
                pieces = [_espeak(w, voice, rate, pitch, path, ssml=False) for w in words]
                fallback = True
            res = {}
            for w, p in zip(words, pieces):
                a = trim_silence(p)
                if len(a) < SR // 50:
                    raise RuntimeError(f"espeak-ng gave no audio for {w!r} ({voice})")
                res[(w, voice, rate, pitch)] = a
            return res, fallback

        with ThreadPoolExecutor(max_workers=workers) as ex:
            for res, fallback in ex.map(one, enumerate(settings)):
                out.update(res)
                if fallback:
                    print(f"  note: word-by-word synthesis for {next(iter(res))[1:]}")
    return out


def voice_settings() -> list[tuple[str, int, int]]:
    return sorted({(v, r, _pitch_for(p, i, 3)) for v, r, p in SPEAKERS.values() for i in range(3)})


def render_speech(item: dict, cache: dict, rng: np.random.Generator):
    """Words with 40-160 ms gaps, sentences with 300-800 ms gaps; returns
    audio and (start, end, word) in samples relative to the item."""
    voice, rate, pitch = SPEAKERS[item["speaker"]]
    chunks, words, pos = [], [], 0
    for si, sent in enumerate(item["sentences"]):
        if si:
            gap = int(rng.uniform(0.3, 0.8) * SR)
            chunks.append(np.zeros(gap, np.float32))
            pos += gap
        parts, spans, p = [], [], 0
        for i, w in enumerate(sent):
            if i:
                gap = int(rng.uniform(0.04, 0.16) * SR)
                parts.append(np.zeros(gap, np.float32))
                p += gap
            a = cache[(w, voice, rate, _pitch_for(pitch, i, len(sent)))]
            a = a * np.float32(10 ** (rng.uniform(-1.5, 1.5) / 20))
            parts.append(a)
            spans.append((p, p + len(a), w))
            p += len(a)
        s = np.concatenate(parts)
        voiced = np.concatenate([s[a:b] for a, b, _ in spans])
        s *= np.float32(SPEECH_RMS / (np.sqrt(np.mean(voiced ** 2)) + 1e-9))
        chunks.append(s)
        words += [(pos + a, pos + b, w) for a, b, w in spans]
        pos += len(s)
    return np.concatenate(chunks), words


# --------------------------------------------------------------------------
# Music, jingles, telephone, hiss
# --------------------------------------------------------------------------
MAJOR = [0, 2, 4, 5, 7, 9, 11]
PROGRESSIONS = [[0, 4, 5, 3], [0, 3, 4, 4], [5, 3, 0, 4], [0, 5, 3, 4]]


def _tone(f: float, n: int, n_harm: int, tilt: float, rng) -> np.ndarray:
    t = np.arange(n, dtype=np.float32) / SR
    out = np.zeros(n, np.float32)
    for k in range(1, n_harm + 1):
        if f * k > SR / 2 - 500:
            break
        out += np.sin(2 * np.pi * f * k * t + rng.uniform(0, 2 * np.pi)).astype(np.float32) / k ** tilt
    return out


def _env(n: int, attack: float, decay: float, sustain: float, release: float) -> np.ndarray:
    t = np.arange(n, dtype=np.float32) / SR
    e = np.minimum(1.0, t / max(attack, 1e-3))
    e *= sustain + (1 - sustain) * np.exp(-np.maximum(t - attack, 0) / max(decay, 1e-3))
    r = int(release * SR)
    if 0 < r < n:
        e[-r:] *= np.linspace(1, 0, r, dtype=np.float32)
    return e.astype(np.float32)


def _chord(root_hz: float, degree: int, octave: int = 0) -> list[float]:
    semis = [MAJOR[(degree + k) % 7] + 12 * ((degree + k) // 7) for k in (0, 2, 4)]
    return [root_hz * 2 ** ((s + 12 * octave) / 12) for s in semis]


def music(n_total: int, rng: np.random.Generator, drums: bool = True) -> np.ndarray:
    """n_total samples of a bed: harmonic chords, bass, a plucked arpeggio
    and a simple beat."""
    from scipy.signal import butter, sosfilt

    bpm = float(rng.uniform(84, 118))
    beat = 60.0 / bpm
    bar_n = int(4 * beat * SR)
    root = 110.0 * 2 ** (int(rng.integers(0, 12)) / 12)
    prog = PROGRESSIONS[int(rng.integers(len(PROGRESSIONS)))]
    hp = butter(2, 3000, btype="high", fs=SR, output="sos")
    out = np.zeros(n_total + 2 * bar_n, np.float32)
    kick_n = int(0.18 * SR)
    tk = np.arange(kick_n) / SR
    kick = (np.sin(2 * np.pi * (50 * tk + 70 * (1 - np.exp(-tk / 0.03)) * 0.03))
            * np.exp(-tk / 0.07)).astype(np.float32)
    n_bars = n_total // bar_n + 1
    for b in range(n_bars):
        s0 = b * bar_n
        deg = prog[b % len(prog)]
        # pad chord, two octaves up from the bass
        for f in _chord(root * 2, deg):
            out[s0:s0 + bar_n] += 0.16 * _tone(f * (1 + rng.normal(0, 0.0015)), bar_n, 6, 1.3, rng) \
                * _env(bar_n, 0.08, 0.6, 0.55, 0.1)
        # bass on beats 1 and 3
        for k in (0, 2):
            a = s0 + int(k * beat * SR)
            n = int(2 * beat * SR)
            out[a:a + n] += 0.35 * _tone(_chord(root, deg)[0], n, 4, 1.8, rng) * _env(n, 0.01, 0.25, 0.2, 0.05)
        # plucked arpeggio on eighth notes
        tones = _chord(root * 4, deg) + [_chord(root * 4, deg)[0] * 2]
        for k in range(8):
            if rng.random() < 0.25:
                continue
            a = s0 + int(k * beat / 2 * SR)
            n = int(beat * 0.9 * SR)
            f = tones[int(rng.integers(len(tones)))]
            out[a:a + n] += 0.12 * _tone(f, n, 5, 1.1, rng) * _env(n, 0.004, 0.12, 0.0, 0.02)
        if drums:
            for k in (0, 2):
                a = s0 + int(k * beat * SR)
                out[a:a + kick_n] += 0.5 * kick
            for k in (1, 3):
                a = s0 + int(k * beat * SR)
                n = int(0.14 * SR)
                sn = sosfilt(hp, rng.standard_normal(n)).astype(np.float32)
                out[a:a + n] += 0.35 * sn * _env(n, 0.001, 0.05, 0.0, 0.01)
            for k in range(8):
                a = s0 + int(k * beat / 2 * SR)
                n = int(0.035 * SR)
                hh = sosfilt(hp, rng.standard_normal(n)).astype(np.float32)
                out[a:a + n] += 0.12 * hh * _env(n, 0.001, 0.012, 0.0, 0.005)
    out = out[:n_total]
    fade = min(int(0.5 * SR), n_total // 4)
    out[:fade] *= np.linspace(0, 1, fade, dtype=np.float32)
    out[-fade:] *= np.linspace(1, 0, fade, dtype=np.float32)
    return out / (np.sqrt(np.mean(out ** 2)) + 1e-9)        # unit RMS


def jingle(dur: float, seed: int) -> np.ndarray:
    """The programme's signature: a rising arpeggio, a sustained chord and a
    noise sweep.  The same seed gives the same motif (tempo follows dur)."""
    from scipy.signal import butter, sosfilt

    rng = np.random.default_rng(seed)
    n_total = int(dur * SR)
    out = np.zeros(n_total, np.float32)
    root = 220.0 * 2 ** (int(rng.integers(0, 12)) / 12)
    deg = int(rng.choice([0, 3, 4]))
    notes = _chord(root, deg) + _chord(root, deg, 1)
    step = int(dur * 0.09 * SR)
    for k, f in enumerate(notes):
        a = k * step
        n = min(int(0.6 * SR), n_total - a)
        out[a:a + n] += 0.3 * _tone(f, n, 6, 1.2, rng) * _env(n, 0.005, 0.2, 0.1, 0.05)
    a = len(notes) * step
    n = n_total - a
    for f in _chord(root, deg) + [root / 2]:
        out[a:] += 0.2 * _tone(f, n, 7, 1.1, rng) * _env(n, 0.02, 0.5, 0.4, min(0.8, n / SR / 2))
    nz = sosfilt(butter(2, [800, 5000], btype="band", fs=SR, output="sos"),
                 rng.standard_normal(n_total)).astype(np.float32)
    out += 0.15 * nz * np.sin(np.linspace(0, np.pi, n_total, dtype=np.float32)) ** 2
    return out / (np.sqrt(np.mean(out ** 2)) + 1e-9)


def telephone(x: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """A caller's line: 300-3400 Hz band, soft clipping, G.711-style 8-bit
    mu-law quantisation and a little line noise."""
    from scipy.signal import butter, sosfilt

    sos = np.vstack([butter(4, 300, btype="high", fs=SR, output="sos"),
                     butter(8, 3400, btype="low", fs=SR, output="sos")])
    y = sosfilt(sos, x)
    peak = np.max(np.abs(y)) + 1e-9
    y = y / peak
    drive = 2.2
    y = np.tanh(drive * y) / np.tanh(drive)
    mu = 255.0
    c = np.sign(y) * np.log1p(mu * np.abs(y)) / np.log1p(mu)
    c = np.round(c * 127) / 127
    y = np.sign(c) * ((1 + mu) ** np.abs(c) - 1) / mu
    y = y + sosfilt(sos, rng.standard_normal(len(y))) * 0.004
    y = sosfilt(sos, y)
    return (y * peak).astype(np.float32)


def hiss(n: int, rng: np.random.Generator, level_db: float) -> np.ndarray:
    from scipy.signal import butter, sosfilt

    w = rng.standard_normal(n).astype(np.float32)
    h = sosfilt(butter(1, 1800, btype="high", fs=SR, output="sos"), w)
    h += 0.3 * sosfilt(butter(1, 400, btype="low", fs=SR, output="sos"), w)
    h = h / (np.sqrt(np.mean(h ** 2)) + 1e-9)
    t = np.arange(n) / SR
    hum = 0.05 * np.sin(2 * np.pi * 50 * t) + 0.02 * np.sin(2 * np.pi * 150 * t)
    return (10 ** (level_db / 20) * (h + hum)).astype(np.float32)


# --------------------------------------------------------------------------
# Assembling a broadcast
# --------------------------------------------------------------------------
def render_broadcast(kind: str, plan: list[dict], cache: dict, rng: np.random.Generator,
                     jingle_seed: int):
    pieces: list[tuple[int, np.ndarray]] = []
    words: list[tuple[int, int, str]] = []
    regions: list[tuple[str, int, int]] = []      # (what, start, end), for checks
    bed_segments: list[tuple[int, int, str, object]] = []
    pos = 0
    for it in plan:
        if it["type"] == "pause":
            n = int(it["dur"] * SR)
            if it.get("bed"):
                bed_segments.append((pos, pos + n, "pause", None))
            pos += n
        elif it["type"] == "jingle":
            j = jingle(it["dur"], jingle_seed) * np.float32(JINGLE_RMS * 10 ** (rng.uniform(-2, 2) / 20))
            pieces.append((pos, j))
            regions.append(("jingle", pos, pos + len(j)))
            pos += len(j) + int(rng.uniform(0.3, 0.7) * SR)
        elif it["type"] == "song":
            n = int(it["dur"] * SR)
            bed_segments.append((pos, pos + n, "song", None))
            regions.append(("song", pos, pos + n))
            pos += n
        else:
            a, ws = render_speech(it, cache, rng)
            a = a * np.float32(10 ** (rng.uniform(-4.0, 3.0) / 20))     # gain change per item
            if it["channel"] == "phone":
                a = telephone(a, rng)
            pieces.append((pos, a))
            words += [(pos + s, pos + e, w) for s, e, w in ws]
            regions.append(("phone" if it["channel"] == "phone" else "speech", pos, pos + len(a)))
            if it["channel"] == "bed":
                bed_segments.append((pos, pos + len(a), "talk", ws))
            pos += len(a)
    n_total = pos
    mix = np.zeros(n_total, np.float32)
    for p, a in pieces:
        mix[p:p + len(a)] += a[: n_total - p]
    if kind == "music":
        # one continuous bed, ducked under the talk to 10-15 dB below the speech
        first = bed_segments[0][0]
        last = bed_segments[-1][1]
        bed = np.zeros(n_total, np.float32)
        bed[first:last] = music(last - first, rng)
        regions.append(("bed", first, last))
        env = np.zeros(n_total, np.float32)
        lead = int(0.5 * SR)
        for s, e, what, ws in bed_segments:
            if what == "song":
                env[s:e] = SONG_RMS
        for s, e, what, ws in bed_segments:
            if what == "talk":
                idx = np.concatenate([np.arange(s + a, s + b) for a, b, _ in ws])
                sp = np.sqrt(np.mean(mix[idx] ** 2))
                bd = np.sqrt(np.mean(bed[idx] ** 2)) + 1e-9
                snr = rng.uniform(10.0, 15.0)
                level = sp / bd / 10 ** (snr / 20)
                env[max(first, s - lead):min(last, e + lead)] = level
                regions.append(("talk_over_bed", s, e))
        # pauses between talk items keep the talk level (they lie between
        # two talk segments), so fill zeros from the neighbours
        for s, e, what, _ in bed_segments:
            if what == "pause":
                seg = env[s:e]
                if np.all(seg == 0):
                    left = env[s - 1] if s > 0 else 0
                    right = env[e] if e < n_total else 0
                    env[s:e] = min(left, right) if min(left, right) > 0 else max(left, right)
        k = int(0.4 * SR)
        c = np.cumsum(np.concatenate([np.zeros(1, np.float64), env.astype(np.float64)]))
        sm = np.empty_like(env)
        half = k // 2
        lo = np.clip(np.arange(n_total) - half, 0, n_total)
        hi = np.clip(np.arange(n_total) + half, 0, n_total)
        sm[:] = (c[hi] - c[lo]) / np.maximum(hi - lo, 1)
        mix += bed * sm
    mix += hiss(n_total, rng, float(rng.uniform(-54.0, -48.0)))
    peak = float(np.max(np.abs(mix)))
    if peak > 0.9:
        mix *= np.float32(0.9 / peak)
    return mix, words, regions


# --------------------------------------------------------------------------
# Checks on the written files
# --------------------------------------------------------------------------
def _rms_db(x: np.ndarray) -> float:
    return 20 * np.log10(np.sqrt(np.mean(x.astype(np.float64) ** 2)) + 1e-12)


def verify(out_dir: Path, originals: dict, words: dict, regions: dict) -> bool:
    import soundfile as sf

    ok = True
    total_s = 0.0
    print("\nbroadcast                                   min    MB  words  speech  gaps  jingle  music  lag")
    for rel in originals:
        path = out_dir / rel
        y, sr = sf.read(path, dtype="float32")
        ref = originals[rel]
        dur = len(y) / sr
        total_s += dur
        if sr != SR or abs(len(y) - len(ref)) > SR // 10:
            print(f"  {rel}: length {len(y)} vs {len(ref)} at {sr} Hz"); ok = False
        ws = words[rel]
        if any(s < 0 or e > dur for s, e, _ in ws):
            print(f"  {rel}: a word lies outside the file"); ok = False
        if any(e <= s for s, e, _ in ws) or any(b[0] < a[1] for a, b in zip(ws, ws[1:])):
            print(f"  {rel}: word spans overlap or are empty"); ok = False
        # alignment of the decoded audio with what was encoded
        seg = slice(SR * 5, SR * 35)
        a, b = ref[seg].astype(np.float64), y[seg].astype(np.float64)
        nfft = 1 << (2 * len(a) - 1).bit_length()
        xc = np.fft.irfft(np.fft.rfft(a, nfft) * np.conj(np.fft.rfft(b, nfft)), nfft)
        lag = int(np.argmax(np.concatenate([xc[-200:], xc[:201]]))) - 200
        if lag != 0:
            print(f"  {rel}: decoded audio is shifted by {lag} samples"); ok = False
        mask = np.zeros(len(y), bool)
        for s, e, _ in ws:
            mask[int(s * sr):int(e * sr)] = True
        reg = regions[rel]
        other = np.ones(len(y), bool)
        jm = np.zeros(len(y), bool)
        mm = np.zeros(len(y), bool)
        for what, s, e in reg:
            if what == "jingle":
                jm[s:e] = True
            if what == "song":
                mm[s:e] = True
            if what in ("jingle", "song", "talk_over_bed", "bed"):
                other[s:e] = False
        other &= ~mask
        sp = _rms_db(y[mask])
        gp = _rms_db(y[other]) if other.any() else float("nan")
        jg = _rms_db(y[jm]) if jm.any() else float("nan")
        mu = _rms_db(y[mm]) if mm.any() else float("nan")
        mb = path.stat().st_size / 1e6
        print(f"{rel:42s} {dur / 60:5.2f} {mb:5.2f} {len(ws):6d} {sp:7.1f} {gp:5.1f} {jg:7.1f} {mu:6.1f} {lag:4d}")
        if other.sum() > SR and not sp > gp + 15:
            print(f"  {rel}: speech is not well above the pauses"); ok = False
        if jm.any() and not sp > jg:
            print(f"  {rel}: jingles are louder than the speech"); ok = False
        if any(what == "phone" for what, _, _ in reg):
            # the telephone band: share of the power above 4 kHz, caller vs
            # studio (the station's own hiss sets a floor under the caller)
            from scipy.signal import butter, sosfilt
            hi = sosfilt(butter(8, 4000, btype="high", fs=SR, output="sos"), y)
            share = {}
            for kind_ in ("phone", "speech"):
                m_ = np.zeros(len(y), bool)
                for what, s, e in reg:
                    if what == kind_:
                        m_[s:e] = True
                m_ &= mask
                share[kind_] = 10 * np.log10(np.mean(hi[m_] ** 2) / np.mean(y[m_] ** 2))
            print(f"  power above 4 kHz: caller {share['phone']:.1f} dB, studio {share['speech']:.1f} dB")
            if not share["phone"] < share["speech"] - 6:
                print(f"  {rel}: the callers are not band-limited"); ok = False
        if mm.any():
            # talk over the bed: speech+bed in word spans vs bed in the
            # sentence gaps inside the same talk segments
            snrs = []
            for what, s, e in reg:
                if what != "talk_over_bed":
                    continue
                inside = mask[s:e]
                seg_y = y[s:e]
                p_sb = np.mean(seg_y[inside].astype(np.float64) ** 2)
                p_b = np.mean(seg_y[~inside].astype(np.float64) ** 2)
                snrs.append(10 * np.log10(max(p_sb / p_b - 1, 1e-6)))
            print(f"  talk over bed: SNR {np.min(snrs):.1f}..{np.max(snrs):.1f} dB "
                  f"(median {np.median(snrs):.1f}) over {len(snrs)} talk segments")
            if not 8.0 < np.median(snrs) < 17.0:
                print(f"  {rel}: talk over the bed is off the 10-15 dB target"); ok = False
    size = sum(f.stat().st_size for f in out_dir.rglob("*") if f.is_file()) / 1e6
    print(f"total {total_s / 60:.2f} min in {len(originals)} broadcasts; folder {size:.2f} MB")
    if total_s < 30 * 60 or size > 15:
        print("  the archive should hold 30 minutes or more in 15 MB or less"); ok = False
    return ok


# --------------------------------------------------------------------------
def main() -> None:
    import soundfile as sf

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", type=Path, default=HERE,
                    help="where to write the broadcasts and tables (default: beside this script)")
    ap.add_argument("--new-vocabulary", action="store_true",
                    help="write vocabulary.txt if it is missing (it is frozen once written)")
    ap.add_argument("--corpus-words", type=Path, default=CORPUS_WORDS)
    args = ap.parse_args()

    if not args.corpus_words.exists():
        sys.exit(f"training corpus word list not found: {args.corpus_words}")
    corpus = load_corpus_words(args.corpus_words)
    lex = ensure_lexicon(corpus, args.new_vocabulary)
    print(f"lexicon: {len(lexicon_words(lex))} words, none in the {len(corpus)} corpus word types")

    settings = voice_settings()
    print(f"synthesising the lexicon in {len(settings)} voice settings with espeak-ng ...", flush=True)
    cache = synthesise(lexicon_words(lex), settings)

    rng_text = np.random.default_rng(AUDIO_SEED)
    sm = SentenceMaker(lex, rng_text)
    plans = [plan_broadcast(kind, mins, spk, sm, rng_text, cache) for _, kind, mins, spk in BROADCASTS]
    counts = place_names(plans, lex["name"], rng_text)

    out_dir = args.out
    originals, all_words, all_regions = {}, {}, {}
    for b, (rel, kind, _, _) in enumerate(BROADCASTS):
        rng_audio = np.random.default_rng([AUDIO_SEED, b])
        jseed = {"news": 11, "notices": 23, "phone": 37, "music": 41}[kind]
        mix, words, regions = render_broadcast(kind, plans[b], cache, rng_audio, jseed)
        path = out_dir / rel
        path.parent.mkdir(parents=True, exist_ok=True)
        sf.write(path, mix, SR, format="OGG", subtype="OPUS", compression_level=0.9)
        originals[rel] = mix
        all_words[rel] = [(s / SR, e / SR, w) for s, e, w in words]
        all_regions[rel] = regions
        print(f"wrote {rel} ({len(mix) / SR / 60:.2f} min, {len(words)} words)", flush=True)

    with open(out_dir / "ground_truth.tsv", "w", encoding="utf-8", newline="\n") as fh:
        fh.write("broadcast\tstart\tend\tword\n")
        for rel in originals:
            for s, e, w in all_words[rel]:
                fh.write(f"{rel}\t{s:.3f}\t{e:.3f}\t{w}\n")

    # example search terms: twelve of the names, in lexicon order
    spoken = {}
    for rel in originals:
        for _, _, w in all_words[rel]:
            spoken[w] = spoken.get(w, 0) + 1
    pick = sorted(rng_text.choice(len(lex["name"]), 12, replace=False))
    terms = [lex["name"][i] for i in pick]
    assert all(spoken[t] == counts[t] >= 3 and len(strip_marks(t)) >= 6 for t in terms)
    (out_dir / "terms.txt").write_text("\n".join(terms) + "\n", encoding="utf-8")
    print("terms:", ", ".join(f"{t} ({spoken[t]})" for t in terms))
    print("all names:", ", ".join(f"{n} {spoken[n]}" for n in lex["name"]))

    if not verify(out_dir, originals, all_words, all_regions):
        sys.exit("verification failed")
    print("all checks passed")


if __name__ == "__main__":
    main()
