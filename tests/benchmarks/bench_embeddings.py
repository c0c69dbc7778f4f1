"""Benchmark of the two encoders on the held-out split of the shared corpus.

    python tests/benchmarks/bench_embeddings.py [--corpus ../shared/corpora/mboshi]
        [--limit N] [--dtw-limit N] [--speed-minutes M] [--seed S] [--write-card]

Measured on the utterances that training never sees (split_by_transcript(corpus, 0.1)[1]),
for aligned words of at least 5 letters (counted after NFD with combining marks removed),
leaving out aligned "words" longer than 2 s (alignment errors) and spans under 0.06 s:

1. acoustic AP: pooled average precision over all token pairs, positive = same word type,
   score = cosine of the span vectors (api.embed_spans, each token in its own utterance);
2. cross-view AP: pooled AP over all (token, type spelling) pairs, the spellings of every
   held-out word type of at least 5 letters embedded with api.embed_spellings;
3. both again for unseen types: types absent from the training part of the corpus (every
   utterance not held out); synthetic training speech is not consulted, as its pseudo-words
   never collide with corpus words;
4. the classical baseline: dynamic time warping over MFCCs (13 + deltas, cosine frame
   distance, cost divided by the warping-path length, score = -cost) on a seeded subset of
   the tokens (--dtw-limit), with the embeddings' AP on that same subset beside it;
5. embedding speed as indexing does it (indexing.embed_broadcast: gating, all frames, all
   windows) on held-out audio concatenated (looped) to --speed-minutes, and the share of
   the log-mel features in it.

Prints a table and, last, one JSON line. With --write-card the numbers go into the model
card (card.json -> "metrics" -> "embeddings") and into MODEL_CARD.md between the markers
<!-- embeddings:start --> and <!-- embeddings:end -->, both in the models folder in use
(TRAWL_MODELS or models/).
"""

from __future__ import annotations

import argparse
import datetime as _dt
import json
import os
import shlex
import sys
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from detector import api  # noqa: E402
from detector.evaluation import average_precision  # noqa: E402
from detector.features import SAMPLE_RATE, log_mel  # noqa: E402
from detector.indexing import embed_broadcast  # noqa: E402
from detector.models import load as load_models  # noqa: E402
from detector.spelling import letter_count, word_type  # noqa: E402
from exporters.corpus import MAX_WORD_SECONDS, load_audio, load_corpus, split_by_transcript  # noqa: E402

MIN_LETTERS = 5
MIN_SPAN_SECONDS = 0.06  # shortest span the span encoder takes (3 frames of 20 ms)
HELD_OUT_FRACTION = 0.1  # as exporters/train.py
START, END = "<!-- embeddings:start -->", "<!-- embeddings:end -->"


@dataclass
class Token:
    utt: int  # index into the held-out utterances
    start: float
    end: float
    type: str


# --------------------------------------------------------------------------
# Data


def select_tokens(held, limit: int | None, seed: int):
    """Tokens of the held-out utterances, with the audio of the utterances they come from.

    Utterances are visited in a seeded random order of their transcripts, readings of one
    transcript together, so that --limit takes whole groups of repeated sentences (which
    keeps same-word pairs in a small subset) and stays reproducible.
    """
    groups: dict[str, list[int]] = {}
    for i, u in enumerate(held):
        groups.setdefault(" ".join(word_type(u.transcript).split()), []).append(i)
    keys = sorted(groups)
    order = [i for g in np.random.default_rng(seed).permutation(len(keys)) for i in groups[keys[g]]]
    tokens: list[Token] = []
    audio: dict[int, np.ndarray] = {}
    skipped = {"longer_than_2s": 0, "shorter_than_0.06s": 0, "unreadable_utterances": 0}
    for ui in order:
        if limit is not None and len(tokens) >= limit:
            break
        u = held[ui]
        words = []
        for s, e, w in u.words:
            if letter_count(w) < MIN_LETTERS:
                continue
            if e - s > MAX_WORD_SECONDS:
                skipped["longer_than_2s"] += 1
                continue
            words.append((s, e, w))
        if not words:
            continue
        try:
            x = load_audio(u)
        except Exception as exc:  # a broken file should not stop the benchmark
            print(f"warning: cannot read {u.audio_path}: {exc}", file=sys.stderr)
            skipped["unreadable_utterances"] += 1
            continue
        duration = len(x) / SAMPLE_RATE
        for s, e, w in words:
            s, e = max(0.0, s), min(e, duration)
            if e - s < MIN_SPAN_SECONDS:
                skipped["shorter_than_0.06s"] += 1
                continue
            tokens.append(Token(int(ui), s, e, word_type(w)))
        audio[int(ui)] = x
    if limit is not None:
        tokens = tokens[:limit]
    used = {t.utt for t in tokens}
    return tokens, {k: v for k, v in audio.items() if k in used}, skipped


def embed_tokens(tokens: list[Token], audio: dict[int, np.ndarray]) -> np.ndarray:
    """Span vectors, one api.embed_spans call per utterance."""
    out = None
    by_utt: dict[int, list[int]] = {}
    for i, t in enumerate(tokens):
        by_utt.setdefault(t.utt, []).append(i)
    for ui, idx in by_utt.items():
        vecs = api.embed_spans(audio[ui], SAMPLE_RATE, [(tokens[i].start, tokens[i].end) for i in idx])
        if out is None:
            out = np.empty((len(tokens), vecs.shape[1]), np.float32)
        out[idx] = vecs
    return out


# --------------------------------------------------------------------------
# Pooled average precision


def pooled(scores: np.ndarray, labels: np.ndarray) -> dict:
    n_pos = int(labels.sum())
    return {
        "ap": average_precision(scores, labels) if n_pos else None,  # undefined without positives
        "pairs": int(labels.size),
        "positives": n_pos,
        "chance": n_pos / labels.size if labels.size else None,  # AP of a random ranking, roughly
    }


def same_type_pairs(scores: np.ndarray, codes: np.ndarray) -> dict:
    """Pooled AP over all unordered pairs i < j of a square score matrix."""
    if len(codes) < 2:
        return {"ap": None, "pairs": 0, "positives": 0, "chance": None}
    iu = np.triu_indices(len(codes), 1)
    return pooled(scores[iu], (codes[:, None] == codes[None, :])[iu])


def acoustic(vecs: np.ndarray, codes: np.ndarray) -> dict:
    return same_type_pairs(vecs @ vecs.T, codes)


def cross_view(vecs: np.ndarray, codes: np.ndarray, spell_vecs: np.ndarray, spell_codes: np.ndarray) -> dict:
    if len(codes) == 0 or len(spell_codes) == 0:
        return {"ap": None, "pairs": 0, "positives": 0, "chance": None}
    scores = vecs @ spell_vecs.T
    return pooled(scores.ravel(), (codes[:, None] == spell_codes[None, :]).ravel())


# --------------------------------------------------------------------------
# Baseline: dynamic time warping over MFCCs


def mfcc_features(x: np.ndarray) -> np.ndarray:
    """(frames, 26): 13 MFCCs and their deltas, 25 ms windows every 10 ms, mean and variance
    normalised over the token (common practice: without it c0, the energy, dominates the cosine)."""
    import librosa

    m = librosa.feature.mfcc(y=x, sr=SAMPLE_RATE, n_mfcc=13, n_fft=400, win_length=400,
                             hop_length=160, n_mels=40)
    n = m.shape[1]
    width = min(9, n if n % 2 else n - 1)
    if width >= 3:
        d = librosa.feature.delta(m, width=width)
    else:
        d = librosa.feature.delta(m, width=3, mode="nearest")
    f = np.vstack([m, d]).T.astype(np.float64)
    return (f - f.mean(axis=0)) / (f.std(axis=0) + 1e-8)


def dtw_scores(feats: list[np.ndarray]) -> np.ndarray:
    """Square matrix of -(path-normalised DTW cost), filled for i < j."""
    import librosa
    from scipy.spatial.distance import cdist

    n = len(feats)
    out = np.zeros((n, n))
    total, done, t0 = n * (n - 1) // 2, 0, time.perf_counter()
    for i in range(n):
        for j in range(i + 1, n):
            c = np.nan_to_num(cdist(feats[i], feats[j], "cosine"), nan=1.0)
            d, path = librosa.sequence.dtw(C=c, backtrack=True)
            out[i, j] = -d[-1, -1] / len(path)
        done += n - 1 - i
        if sys.stderr.isatty() and (i % 20 == 0 or done == total):
            print(f"\r  DTW {done}/{total} pairs, {time.perf_counter() - t0:.0f} s", end="", file=sys.stderr)
    if sys.stderr.isatty() and total:
        print(file=sys.stderr)
    return out


# --------------------------------------------------------------------------
# Speed


def speed(held, audio: dict[int, np.ndarray], minutes: float, limited: bool) -> dict:
    """Time embed_broadcast and log_mel on `minutes` of held-out audio (looped to fill)."""
    want = int(round(minutes * 60 * SAMPLE_RATE))
    pieces = [audio[k] for k in sorted(audio)]
    have = sum(len(p) for p in pieces)
    if not limited:  # draw on further held-out utterances until there is enough
        for ui, u in enumerate(held):
            if have >= want:
                break
            if ui in audio:
                continue
            try:
                pieces.append(load_audio(u))
            except Exception:
                continue
            have += len(pieces[-1])
    source = np.concatenate(pieces).astype(np.float32)
    x = np.resize(source, want)  # repeats the source from its start to fill
    models = load_models()
    embed_broadcast(models, x[: 10 * SAMPLE_RATE])  # warm-up: sessions, caches
    t0 = time.perf_counter()
    emb = embed_broadcast(models, x)
    t_total = time.perf_counter() - t0
    t0 = time.perf_counter()
    log_mel(x)
    t_feat = time.perf_counter() - t0
    seconds = len(x) / SAMPLE_RATE
    return {
        "audio_seconds": seconds,
        "distinct_audio_seconds": min(seconds, len(source) / SAMPLE_RATE),
        "speech_seconds": emb.speech_seconds,
        "windows": int(len(emb.vectors)),
        "wall_seconds": t_total,
        "seconds_per_audio_hour": t_total * 3600.0 / seconds,
        "times_real_time": seconds / t_total,
        "log_mel_seconds": t_feat,
        "log_mel_share": t_feat / t_total,
        "cpu_count": os.cpu_count(),
        "load_average_1min": os.getloadavg()[0] if hasattr(os, "getloadavg") else None,
        "threads": os.environ.get("TRAWL_THREADS", "0 (onnxruntime default)"),
    }


# --------------------------------------------------------------------------
# Report


def fmt(v, digits=3):
    return "n/a" if v is None else f"{v:.{digits}f}"


def row(name: str, tokens: int, types: int, r: dict) -> str:
    return (f"  {name:<30}{tokens:>7}{types:>7}{r['pairs']:>11}{r['positives']:>9}"
            f"{fmt(r['ap']):>8}{fmt(r['chance'], 4):>9}")


def print_table(res: dict) -> None:
    d, s = res["data"], res.get("speed")
    print(f"models: {res['models']['dir']} ({res['models']['name']}, created {res['models']['created']})")
    print(f"corpus: {res['corpus']}  held-out utterances: {d['held_out_utterances']} of {d['corpus_utterances']}"
          + (f"  (--limit {res['limit']}: tokens from {d['utterances_used']} utterances)" if res["limit"] else ""))
    sk = d["skipped"]
    print(f"tokens with >= {MIN_LETTERS} letters: {d['tokens']} ({d['token_types']} types); left out: "
          f"{sk['longer_than_2s']} longer than 2 s, {sk['shorter_than_0.06s']} shorter than 0.06 s, "
          f"{sk['unreadable_utterances']} unreadable utterances")
    print(f"spellings: {d['spellings']} held-out types, {d['unseen_spellings']} of them unseen in training "
          f"({d['unseen_tokens']} tokens)")
    print()
    print(f"  {'measure':<30}{'tokens':>7}{'types':>7}{'pairs':>11}{'pos':>9}{'AP':>8}{'chance':>9}")
    a = res["all"]
    u = res["unseen"]
    print(row("acoustic (all)", d["tokens"], d["token_types"], a["acoustic"]))
    print(row("cross-view (all)", d["tokens"], d["spellings"], a["cross_view"]))
    print(row("acoustic (unseen types)", d["unseen_tokens"], d["unseen_token_types"], u["acoustic"]))
    print(row("cross-view (unseen types)", d["unseen_tokens"], d["unseen_spellings"], u["cross_view"]))
    dt = res.get("dtw")
    if dt:
        note = "all tokens" if dt["tokens"] == d["tokens"] else f"{dt['tokens']} tokens drawn with seed {dt['seed']}"
        print(f"  -- baseline subset ({note}; DTW took {dt['wall_seconds']:.1f} s)")
        print(row("DTW over MFCCs", dt["tokens"], dt["types"], dt["dtw"]))
        print(row("embeddings, same tokens", dt["tokens"], dt["types"], dt["embeddings"]))
    print()
    if s:
        print(f"speed: {s['audio_seconds'] / 60:.1f} min of held-out audio ({s['distinct_audio_seconds'] / 60:.1f} min "
              f"distinct, looped), {s['speech_seconds'] / 60:.1f} min passed the speech gate, {s['windows']} windows")
        print(f"  embed_broadcast {s['wall_seconds']:.2f} s: {s['seconds_per_audio_hour']:.1f} s per audio hour, "
              f"{s['times_real_time']:.0f}x real time; log-mel features {s['log_mel_seconds']:.2f} s "
              f"({100 * s['log_mel_share']:.1f} % of it)")
        print(f"  on {s['cpu_count']} CPU cores, 1-min load average {fmt(s['load_average_1min'], 2)} at the end, "
              f"TRAWL_THREADS={s['threads']}")


def exact_command() -> str:
    env = f"TRAWL_MODELS={shlex.quote(os.environ['TRAWL_MODELS'])} " if os.environ.get("TRAWL_MODELS") else ""
    return env + shlex.join(["python", *sys.argv])


def atomic_write(path: Path, text: str) -> None:
    tmp = path.with_name(path.name + ".tmp")
    tmp.write_text(text, encoding="utf-8")
    os.replace(tmp, path)


def markdown_section(res: dict) -> str:
    d = res["data"]
    lines = [START, "## Embeddings (held-out split)", ""]
    lines.append(f"Measured {res['measured']} by `tests/benchmarks/bench_embeddings.py` on {res['corpus']}: "
                 f"{d['held_out_utterances']} held-out utterances (grouped by transcript, never used in training), "
                 f"{d['tokens']} tokens of at least {MIN_LETTERS} letters ({d['token_types']} types), "
                 f"aligned words over 2 s left out."
                 + (f" **Subset only (--limit {res['limit']}).**" if res["limit"] else ""))
    lines += ["", "| measure | tokens | pairs | positives | AP | chance |", "|---|---:|---:|---:|---:|---:|"]

    def md(name, tokens, r):
        lines.append(f"| {name} | {tokens} | {r['pairs']} | {r['positives']} | {fmt(r['ap'])} | {fmt(r['chance'], 4)} |")

    md("acoustic, all types", d["tokens"], res["all"]["acoustic"])
    md("cross-view, all types", d["tokens"], res["all"]["cross_view"])
    md("acoustic, unseen types", d["unseen_tokens"], res["unseen"]["acoustic"])
    md("cross-view, unseen types", d["unseen_tokens"], res["unseen"]["cross_view"])
    if res.get("dtw"):
        dt = res["dtw"]
        md(f"DTW over MFCCs ({dt['tokens']} tokens, seed {dt['seed']})", dt["tokens"], dt["dtw"])
        md("embeddings, same tokens", dt["tokens"], dt["embeddings"])
    s = res.get("speed")
    if s:
        lines += ["", f"Speed (indexing path, {s['audio_seconds'] / 60:.1f} min of held-out audio, "
                      f"{s['cpu_count']} CPU cores, load average {fmt(s['load_average_1min'], 2)}): "
                      f"{s['seconds_per_audio_hour']:.1f} s per audio hour ({s['times_real_time']:.0f}x real time), "
                      f"log-mel features {100 * s['log_mel_share']:.1f} % of it."]
    lines += ["", "Command:", "", "```", res["command"], "```", END]
    return "\n".join(lines)


def write_card(res: dict, directory: Path) -> None:
    card_path = directory / "card.json"
    card = json.loads(card_path.read_text(encoding="utf-8"))
    card.setdefault("metrics", {})["embeddings"] = res
    atomic_write(card_path, json.dumps(card, indent=1, ensure_ascii=False) + "\n")
    md_path = directory / "MODEL_CARD.md"
    section = markdown_section(res)
    text = md_path.read_text(encoding="utf-8") if md_path.exists() else "# Trawl model card\n"
    if START in text and END in text and text.index(START) < text.index(END):
        text = text[: text.index(START)] + section + text[text.index(END) + len(END):]
    else:
        text = text.rstrip("\n") + "\n\n" + section + "\n"
    atomic_write(md_path, text)
    print(f"wrote metrics.embeddings to {card_path} and the embeddings section of {md_path}")
    print("note: card.json changed, so indexes made with the previous card will ask for re-indexing")


# --------------------------------------------------------------------------


def main(argv=None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--corpus", type=Path, default=ROOT.parent / "shared" / "corpora" / "mboshi")
    ap.add_argument("--limit", type=int, default=None, help="at most N tokens (whole utterances, seeded order)")
    ap.add_argument("--dtw-limit", type=int, default=600, help="tokens for the DTW baseline (0: skip it)")
    ap.add_argument("--speed-minutes", type=float, default=None,
                    help="audio for the speed test (default 10, or 1 with --limit; 0: skip it)")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--write-card", action="store_true", help="record the numbers in the model card")
    a = ap.parse_args(argv)
    if a.limit is not None and a.limit < 2:
        ap.error("--limit must be at least 2")
    speed_minutes = a.speed_minutes if a.speed_minutes is not None else (1.0 if a.limit else 10.0)

    models = load_models()  # fails early, with its own message, when the models are missing
    utts = load_corpus(a.corpus)
    train_u, held = split_by_transcript(utts, HELD_OUT_FRACTION)
    train_types = {word_type(w) for u in train_u for _, _, w in u.words}
    spellings = sorted({word_type(w) for u in held for _, _, w in u.words if letter_count(w) >= MIN_LETTERS})
    unseen_spellings = [t for t in spellings if t not in train_types]

    tokens, audio, skipped = select_tokens(held, a.limit, a.seed)
    if len(tokens) < 2:
        sys.exit("fewer than two usable tokens in the held-out split")
    vecs = embed_tokens(tokens, audio)
    spell_vecs = api.embed_spellings(spellings)
    code = {t: i for i, t in enumerate(spellings)}
    codes = np.array([code[t.type] for t in tokens])
    spell_codes = np.arange(len(spellings))
    unseen = np.array([t.type not in train_types for t in tokens])
    unseen_cols = np.array([code[t] for t in unseen_spellings], dtype=int)

    res: dict = {
        "measured": _dt.datetime.now().isoformat(timespec="seconds"),
        "command": exact_command(),
        "corpus": Path(a.corpus).name,
        "models": {"dir": str(models.dir), "name": models.card.get("name"), "created": models.card.get("created"),
                   "files": {k: v["sha256"][:16] for k, v in models.card["files"].items()}},
        "limit": a.limit,
        "min_letters": MIN_LETTERS,
        "max_word_seconds": MAX_WORD_SECONDS,
        "data": {
            "corpus_utterances": len(utts),
            "held_out_utterances": len(held),
            "utterances_used": len(audio),
            "tokens": len(tokens),
            "token_types": len(set(codes.tolist())),
            "skipped": skipped,
            "spellings": len(spellings),
            "unseen_spellings": len(unseen_spellings),
            "unseen_tokens": int(unseen.sum()),
            "unseen_token_types": len(set(codes[unseen].tolist())),
        },
        "all": {"acoustic": acoustic(vecs, codes), "cross_view": cross_view(vecs, codes, spell_vecs, spell_codes)},
        "unseen": {
            "acoustic": acoustic(vecs[unseen], codes[unseen]),
            "cross_view": cross_view(vecs[unseen], codes[unseen], spell_vecs[unseen_cols], unseen_cols),
        },
    }

    if a.dtw_limit > 0:
        n = len(tokens)
        if n > a.dtw_limit:
            subset = np.sort(np.random.default_rng(a.seed).choice(n, a.dtw_limit, replace=False))
        else:
            subset = np.arange(n)
        feats = []
        for i in subset:
            t = tokens[i]
            x = audio[t.utt]
            feats.append(mfcc_features(x[int(round(t.start * SAMPLE_RATE)):int(round(t.end * SAMPLE_RATE))]))
        t0 = time.perf_counter()
        dtw = dtw_scores(feats)
        wall = time.perf_counter() - t0
        sub_codes = codes[subset]
        res["dtw"] = {
            "tokens": len(subset), "types": len(set(sub_codes.tolist())), "seed": a.seed, "wall_seconds": wall,
            "dtw": same_type_pairs(dtw, sub_codes),
            "embeddings": acoustic(vecs[subset], sub_codes),
        }

    if speed_minutes > 0:
        res["speed"] = speed(held, audio, speed_minutes, limited=a.limit is not None)

    print_table(res)
    if a.write_card:
        write_card(res, Path(models.dir))
    print(json.dumps(res, ensure_ascii=False))
    return res


if __name__ == "__main__":
    main()
