"""How the models hear what an archivist will meet: seen voices, unseen speakers, an unseen
language and an unseen channel, each beside the classical baseline on the same tokens.

    python tests/benchmarks/bench_conditions.py [--tokens 600] [--dtw-tokens 250] [--seed 0]
        [--split held|dev] [--write-card]

Conditions (exporters/corpus.py, CORPUS_ROLES; nothing here was used in training):
- seen voices: Mboshi sentences held out by transcript (the two trained speakers), clean;
- unseen speakers: the Arabic isolated-word corpora's held-out speakers (never heard in training);
- unseen language: English digits (6 speakers, recorded at 8 kHz; never trained on);
- unseen channel: the seen voices' held-out sentences through the held-back channel
  (music tracks never used in training at 5-15 dB, Urdu television babble at 12-22 dB, a
  100-5000 Hz band: augment.radio_chain(pool="held"));
- unseen codec: the same sentences, clean, through codec2 at 3200 bit/s (never in training);
- trained channel: the same sentences through a random channel of the training pool (for scale).

For each: tokens of at least 4 letters (after NFD, marks removed), at most 2 s; acoustic AP
(pooled over all token pairs, positive = same word type), cross-view AP (all token x type
spelling pairs), DTW over MFCCs (13 + deltas, per-token normalised, path-normalised cost) on a
seeded subset with the embeddings' acoustic AP on that same subset beside it, and the letter
head's greedy letter error over whole utterances (edit distance / reference letters).

Search (--search-minutes M, default 6; 0 skips it): per condition, about M minutes of its
utterances joined into 2-minute broadcasts with pauses (exporters/broadcasts.py), indexed and
searched for every type of at least 4 letters (top 100); MTWV (NIST 2006 term-weighted value,
beta 999.9, T = all audio searched) and P@10 as bench_search.py computes them. The unseen
channel's broadcasts pass through the held-back channel whole.

--split dev measures on the dev speakers and sentences instead (model selection uses those).
Prints a table and, last, one JSON line. --write-card puts the table into the model card in use
(MODEL_CARD.md between <!-- conditions:start --> and <!-- conditions:end -->); --from-log LOG
writes the table of an earlier run (the last JSON line this script printed) instead of measuring.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from bench_embeddings import Token, acoustic, cross_view, dtw_scores, embed_tokens, mfcc_features  # noqa: E402

from detector import api  # noqa: E402
from detector.features import SAMPLE_RATE, log_mel  # noqa: E402
from detector.letters import letter_ids, letter_logprobs  # noqa: E402
from detector.models import load as load_models  # noqa: E402
from detector.spelling import letter_count, word_type  # noqa: E402
from exporters import augment  # noqa: E402
from exporters.corpus import MAX_WORD_SECONDS, corpus_splits, load_audio  # noqa: E402
from exporters.edit_distance import pairwise  # noqa: E402

CORPORA = ROOT.parent / "shared" / "corpora"
MIN_LETTERS = 4


def conditions(split: str) -> dict[str, tuple[list, str]]:
    """{condition: (utterances, channel)}; channel is 'clean', 'held', 'codec2' or 'train'."""
    s = corpus_splits(CORPORA)
    part = "held" if split == "held" else "dev"
    mboshi = s.get("mboshi", {}).get(part, [])
    arabic = [u for name in ("arabic-commands", "arabic-emotions") for u in s.get(name, {}).get(part, [])]
    return {
        "seen voices": (mboshi, "clean"),
        "unseen speakers": (arabic, "clean"),
        "unseen language": (s.get("english-digits", {}).get("language", []), "clean"),
        "unseen channel": (mboshi, "held"),
        "unseen codec": (mboshi, "codec2"),
        "trained channel": (mboshi, "train"),
    }


def select(utts, channel: str, limit: int, seed: int, sources: dict):
    """Tokens (>= MIN_LETTERS letters, <= 2 s) of a seeded sample of utterances, the audio they come from,
    and the utterances' letter references."""
    rng = np.random.default_rng(seed)
    order = rng.permutation(len(utts))
    tokens, audio, refs = [], {}, {}
    for k in order:
        if len(tokens) >= limit:
            break
        u = utts[int(k)]
        words = [(s, e, word_type(w)) for s, e, w in u.words if letter_count(w) >= MIN_LETTERS and 0.06 <= e - s <= MAX_WORD_SECONDS]
        if not words:
            continue
        x = load_audio(u)
        f, lead = 1.0, 0.0
        if channel == "codec2":
            x = augment.codec2(x)
        elif channel != "clean":
            x, f, lead = augment.radio_chain(x, rng, **sources[channel])
        dur = len(x) / SAMPLE_RATE
        for s, e, w in words:
            a, b = lead + s / f, min(dur, lead + e / f)
            if b - a >= 0.06:
                tokens.append(Token(int(k), a, b, w))
        audio[int(k)] = x
        refs[int(k)] = " ".join(w for _, _, w in sorted(u.words))
    tokens = tokens[:limit]
    used = {t.utt for t in tokens}
    return tokens, {k: v for k, v in audio.items() if k in used}, {k: v for k, v in refs.items() if k in used}


def letter_error(models, audio: dict, refs: dict) -> float | None:
    if not models.has_letters:
        return None
    errs = total = 0
    for k, x in audio.items():
        feats = log_mel(x)
        lp = letter_logprobs(models, feats, models.frames(feats))
        best = lp.argmax(1)
        hyp = [int(c) for i, c in enumerate(best) if c != 0 and (i == 0 or c != best[i - 1])]
        ref = letter_ids(refs[k], models.letter_table)
        errs += int(pairwise([hyp], [ref])[0, 0])
        total += len(ref)
    return errs / max(1, total)


def measure(name, utts, channel, args, models, sources) -> dict:
    t0 = time.time()
    tokens, audio, refs = select(utts, channel, args.tokens, args.seed, sources)
    if len(tokens) < 2:
        return {"condition": name, "tokens": len(tokens)}
    vecs = embed_tokens(tokens, audio)
    types = sorted({t.type for t in tokens})
    codes = np.array([types.index(t.type) for t in tokens])
    spell = api.embed_spellings(types)
    res = {"condition": name, "channel": channel, "tokens": len(tokens), "types": len(types),
           "speakers": len({utts[t.utt].speaker for t in tokens}),
           "acoustic_ap": acoustic(vecs, codes)["ap"],
           "crossview_ap": cross_view(vecs, codes, spell, np.arange(len(types)))["ap"],
           "chance_acoustic": acoustic(vecs, codes)["chance"]}
    sub = np.random.default_rng(args.seed + 1).permutation(len(tokens))[: args.dtw_tokens]
    sub = np.sort(sub)
    feats = [mfcc_features(audio[tokens[i].utt][int(tokens[i].start * SAMPLE_RATE):int(tokens[i].end * SAMPLE_RATE)])
             for i in sub]
    d = dtw_scores(feats)
    iu = np.triu_indices(len(sub), 1)
    same = (codes[sub][:, None] == codes[sub][None, :])[iu]
    from detector.evaluation import average_precision

    res["dtw_tokens"] = int(len(sub))
    res["dtw_ap"] = average_precision(d[iu], same) if same.any() else None
    res["embedding_ap_on_dtw_tokens"] = average_precision((vecs[sub] @ vecs[sub].T)[iu], same) if same.any() else None
    res["letter_error"] = letter_error(models, audio, refs)
    res["seconds"] = round(time.time() - t0, 1)
    return res


def search_condition(name, utts, channel, args, sources, train_types) -> dict:
    """Broadcasts of the condition's utterances, indexed and searched: MTWV and P@10."""
    import shutil

    from detector.evaluate_run import evaluate_hits
    from detector.evaluation import read_reference
    from detector.indexing import index_archive
    from detector.search import Searcher
    from exporters import broadcasts as builder

    work = ROOT / "runs" / "bench_conditions" / args.models_hash[:12] / args.split / name.replace(" ", "-")
    shutil.rmtree(work, ignore_errors=True)
    held = {"held": lambda x, rng: augment.radio_chain(x, rng, **sources["held"])[0],
            "codec2": lambda x, rng: augment.codec2(x)}.get(channel)
    m = builder.build(work / "b", minutes_total=args.search_minutes, seed=args.seed, broadcast_minutes=2.0,
                      opus=False, utterances=utts, train_types=train_types, channel=held, min_letters=MIN_LETTERS)
    folder = work / "b" / ("clean" if held is None else "radio")
    index_archive(folder, work / "index")
    terms = [t for t, _, _ in builder.read_terms(work / "b" / "terms.tsv")]
    s = Searcher(work / "index")
    hits = [h for t in terms for h in s.search(t, top=100)]
    reference = read_reference(work / "b" / "reference.tsv")
    r = evaluate_hits(hits, reference, terms, s.total_seconds, s.uncalibrated_centre)
    return {"search_minutes": round(sum(b["seconds"] for b in m["broadcasts"]) / 60, 1), "terms": len(terms),
            "mtwv": r["mtwv"], "p_at_10": r["p_at_10"], "occurrences": r["occurrences"]}


START, END = "<!-- conditions:start -->", "<!-- conditions:end -->"


def card_section(out: dict) -> str:
    rows = ["| condition | tokens / types / speakers | acoustic AP | cross-view AP | DTW AP (emb. on the same tokens) "
            "| letter error | MTWV |", "|---|---|---:|---:|---|---:|---:|"]
    for r in out["results"]:
        rows.append(f"| {r['condition']} | {r['tokens']} / {r.get('types', 0)} / {r.get('speakers', 0)} | "
                    f"{fmt(r.get('acoustic_ap'))} | {fmt(r.get('crossview_ap'))} | {fmt(r.get('dtw_ap'))} "
                    f"({fmt(r.get('embedding_ap_on_dtw_tokens'))}) | {fmt(r.get('letter_error'))} | {fmt(r.get('mtwv'))} |")
    return "\n".join([START, "## Seen and unseen speakers, language and channel", "",
                      f"`{out['command'].strip()}` (split: {out['split']}; tests/benchmarks/bench_conditions.py says "
                      "what each condition is):", ""] + rows + [END])


def write_card(out: dict, directory: Path) -> None:
    import re

    md = directory / "MODEL_CARD.md"
    text = md.read_text(encoding="utf-8") if md.exists() else ""
    section = card_section(out)
    if START in text:
        text = re.sub(re.escape(START) + ".*?" + re.escape(END), lambda _: section, text, flags=re.S)
    else:
        text = text.rstrip("\n") + "\n\n" + section + "\n"
    md.write_text(text, encoding="utf-8")
    print(f"wrote the conditions table into {md}")


def fmt(v, digits=3):
    return "-" if v is None else f"{v:.{digits}f}"


def main(argv=None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--tokens", type=int, default=600, help="tokens per condition (seeded sample)")
    ap.add_argument("--dtw-tokens", type=int, default=250, help="tokens per condition for the DTW baseline")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--split", choices=["held", "dev"], default="held")
    ap.add_argument("--only", nargs="*", default=None, help="condition names to run")
    ap.add_argument("--search-minutes", type=float, default=6.0, help="minutes of speech searched per condition (0: none)")
    ap.add_argument("--write-card", action="store_true", help="put the table into the model card in use")
    ap.add_argument("--from-log", type=Path, default=None, help="with --write-card: an earlier run's output")
    args = ap.parse_args(argv)
    if args.from_log is not None:
        from detector.models import models_dir

        out = json.loads(args.from_log.read_text(encoding="utf-8").strip().splitlines()[-1])
        write_card(out, models_dir())
        return out
    if not CORPORA.exists():
        raise SystemExit(f"{CORPORA} is missing: this benchmark needs the shared corpora")
    models = load_models()
    args.models_hash = models.card_hash
    sources = {pool: augment.channel_sources(pool, ROOT / "runs" / "music") for pool in ("held", "train")}
    results = []
    print(f"models: {models.dir} (card {models.card_hash[:12]}); split: {args.split}")
    print(f"{'condition':18} {'tokens':>6} {'types':>5} {'spk':>4} {'acoustic AP':>11} {'cross-view AP':>13} "
          f"{'DTW AP':>7} {'emb AP (DTW set)':>16} {'letter err':>10} {'MTWV':>6} {'P@10':>5}")
    splits = corpus_splits(CORPORA)
    train_types = {w for parts in splits.values() for u in parts.get("train", []) for _, _, w in u.words}
    for name, (utts, channel) in conditions(args.split).items():
        if args.only and name not in args.only:
            continue
        r = measure(name, utts, channel, args, models, sources)
        if args.search_minutes > 0 and channel != "train":
            r.update(search_condition(name, utts, channel, args, sources, train_types))
        results.append(r)
        print(f"{name:18} {r['tokens']:>6} {r.get('types', 0):>5} {r.get('speakers', 0):>4} {fmt(r.get('acoustic_ap')):>11} "
              f"{fmt(r.get('crossview_ap')):>13} {fmt(r.get('dtw_ap')):>7} {fmt(r.get('embedding_ap_on_dtw_tokens')):>16} "
              f"{fmt(r.get('letter_error')):>10} {fmt(r.get('mtwv')):>6} {fmt(r.get('p_at_10'), 2):>5}", flush=True)
    out = {"benchmark": "conditions", "split": args.split, "model_card": models.card_hash, "results": results,
           "command": "python tests/benchmarks/bench_conditions.py " + " ".join(argv if argv is not None else sys.argv[1:])}
    print(json.dumps(out))
    if args.write_card:
        write_card(out, models.dir)
    return out


if __name__ == "__main__":
    main()
