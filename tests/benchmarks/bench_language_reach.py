"""Language reach: how well Trawl finds words of a spelling, or a language, it never saw.

Two parts, both measured as cross-view retrieval over embedded word tokens: each word type
is a query (its spelling through the spelling encoder), every token a candidate, ranked by
cosine. MAP is the mean over query types of that ranking's average precision; pooled AP
ranks all (token, type) pairs together (CONTRACTS.md, "Embeddings and evaluation").

1. New orthography. Held-out Mboshi words (the transcript split of exporters/corpus.py,
   tokens of at least 5 letters and at most 2 s) are re-spelled in a proxy orthography
   (`respell` below: an unfamiliar but consistent convention). Rows:
     (a) the original spellings, (b) the proxy spellings zero-shot, (c) the proxy
     spellings through the archivist's rules file models/rules/mboshi-respelled.rules.
   Rules recovery = MAP(c) / MAP(a). Then query-side adaptation without the rules
   (CONTRACTS.md, "Language reach"): the types are dealt into halves A and B; an
   archivist searches the proxy spellings of A's types and checks the top hits by ear
   (verdicts from the true labels) until the checked sample holds --hits hits; a query
   map is fitted on them and MAP on B's proxy spellings is measured before and after.
   Gap = MAP_B(original) - MAP_B(proxy); recovered fraction = (after - before) / gap.

2. Held-out synthetic language. Pseudo-words with a Swahili letter inventory, spoken by
   espeak-ng's Swahili voice (never used in training; exporters/synth.py's LANGUAGES),
   in several variants, rates and pitches, joined into short utterances with known word
   times. The same A/B adaptation is measured on them.

    TRAWL_MODELS=/tmp/mq python tests/benchmarks/bench_language_reach.py --quick
    python tests/benchmarks/bench_language_reach.py            # a few minutes on 2 cores

Prints a table and, last, one JSON line; writes runs/bench_language_reach.json.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
import unicodedata
from dataclasses import dataclass
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from detector import TrawlError, api  # noqa: E402
from detector.adaptation import fit_query_map  # noqa: E402
from detector.evaluation import average_precision  # noqa: E402
from detector.models import load as load_models  # noqa: E402
from detector.rules import load_rules  # noqa: E402
from detector.spelling import letter_count, strip_marks, word_type  # noqa: E402
from exporters.corpus import MAX_WORD_SECONDS, load_audio, load_corpus, split_by_transcript  # noqa: E402
from exporters.synth import LANGUAGES, SAMPLE_RATE, excluded_words, join, plain, plan, speak_groups  # noqa: E402

CORPUS = ROOT.parent / "shared" / "corpora" / "mboshi"
RULES = ROOT / "models" / "rules" / "mboshi-respelled.rules"
OUT = ROOT / "runs" / "bench_language_reach.json"
QUICK_OUT = ROOT / "runs" / "bench_language_reach.quick.json"
MIN_LETTERS = 5
TARGET_RULES_RECOVERY = 0.90  # MAP(proxy + rules) / MAP(original)
TARGET_GAP_RECOVERED = 0.5  # share of the zero-shot gap that adaptation must win back


# ---------------------------------------------------------------- the proxy orthography

MBOSHI_VOWELS = set("aeiouεω")
OPEN_VOWELS = {"ε": "eh", "ω": "oh"}
BEFORE_C = set("aouωw")  # k is written c before these letters
HIGH_TONE = "\u0301"


def respell(word: str) -> str:
    """A Mboshi spelling in the proxy orthography (the forward direction of the rules file).

    ε -> eh, ω -> oh; a long vowel (the same vowel with the same tone twice) is written
    once with a colon; a high tone is the digit 1 after its vowel (after the colon), a
    low tone is not written; w -> ou, ny -> gn, y -> j, and k -> c before a, o, u, ω, w.
    """
    segments: list[tuple[str, bool]] = []  # (base letter, carries a high tone)
    for ch in unicodedata.normalize("NFD", word_type(word)):
        if ch == HIGH_TONE and segments:
            segments[-1] = (segments[-1][0], True)
        elif unicodedata.combining(ch):
            raise ValueError(f"{word!r}: the proxy has no spelling for the mark U+{ord(ch):04X}")
        else:
            segments.append((ch, False))
    out: list[str] = []
    i = 0
    while i < len(segments):
        letter, high = segments[i]
        following = segments[i + 1][0] if i + 1 < len(segments) else ""
        if letter in MBOSHI_VOWELS:
            long = i + 1 < len(segments) and segments[i + 1] == segments[i]
            out.append(OPEN_VOWELS.get(letter, letter) + (":" if long else "") + ("1" if high else ""))
            i += 2 if long else 1
            continue
        if high:
            raise ValueError(f"{word!r}: a tone mark on the consonant {letter!r}")
        if letter == "n" and following == "y":
            out.append("gn")
            i += 2
            continue
        out.append({"y": "j", "w": "ou"}.get(letter, "c" if letter == "k" and following in BEFORE_C else letter))
        i += 1
    return "".join(out)


# ---------------------------------------------------------------- measures

@dataclass
class Tokens:
    """Embedded word tokens: one unit vector and one word type per token."""

    vectors: np.ndarray  # (n, d)
    types: np.ndarray  # (n,) object: the word type of each token

    def __len__(self) -> int:
        return len(self.types)


def crossview(tokens: Tokens, queries: np.ndarray, query_types: list[str]) -> dict:
    """MAP over the query types and pooled AP, ranking all tokens by cosine to each query."""
    scores = tokens.vectors @ queries.T
    labels = tokens.types[:, None] == np.array(query_types, dtype=object)[None, :]
    per_type = [average_precision(scores[:, j], labels[:, j]) for j in range(len(query_types))]
    return {"map": float(np.mean(per_type)), "pooled_ap": average_precision(scores.ravel(), labels.ravel()),
            "types": len(query_types)}


def checked_sample(tokens: Tokens, queries: dict[str, np.ndarray], order: list[str], n_hits: int,
                   per_term: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, list[str]]:
    """The archivist's checking, simulated: for each type in ``order``, its ``per_term``
    best tokens by cosine to its query, with verdicts from the true labels, until the
    sample holds ``n_hits`` hits. Returns q, a, y and term ids for fit_query_map."""
    q, a, y, terms = [], [], [], []
    for t in order:
        best = np.argsort(-(tokens.vectors @ queries[t]), kind="stable")[:per_term]
        for i in best:
            q.append(queries[t])
            a.append(tokens.vectors[i])
            y.append(int(tokens.types[i] == t))
            terms.append(t)
        if len(q) >= n_hits:
            break
    n = min(n_hits, len(q))
    return np.array(q[:n]), np.array(a[:n]), np.array(y[:n]), terms[:n]


def halves(types: list[str], seed: int) -> tuple[list[str], list[str]]:
    """Types dealt into halves A (checked) and B (evaluated), A in checking order."""
    order = np.random.default_rng(seed).permutation(len(types))
    shuffled = [types[i] for i in order]
    cut = len(shuffled) // 2
    return shuffled[:cut], sorted(shuffled[cut:])


def adapt(tokens: Tokens, query_of: dict[str, np.ndarray], types: list[str], n_hits: int, per_term: int,
          seed: int, reference_of: dict[str, np.ndarray] | None = None) -> dict:
    """Fit a query map on checked hits of half the types; MAP of the other half before/after.

    ``query_of``: the query vector each type is searched with (no rules); ``reference_of``:
    optional vectors of the same types in their own spelling, for the gap.
    """
    a_types, b_types = halves(types, seed)
    q, a, y, terms = checked_sample(tokens, query_of, a_types, n_hits, per_term)
    b_queries = np.stack([query_of[t] for t in b_types])
    before = crossview(tokens, b_queries, b_types)
    out: dict = {"types_a": len(a_types), "types_b": len(b_types), "hits": len(y),
                 "confirmed": int(np.sum(y)), "checked_terms": len(set(terms)),
                 "hits_per_term": per_term, "before": before}
    if reference_of is not None:
        out["original"] = crossview(tokens, np.stack([reference_of[t] for t in b_types]), b_types)
        out["gap"] = out["original"]["map"] - before["map"]
    try:
        qmap, report = fit_query_map(q, a, y, terms, seed=seed)
    except TrawlError as exc:  # too few hits, terms or confirmations: search keeps the identity
        out.update(refused=str(exc), enabled=False, after=None, after_used=before)
    else:
        after = crossview(tokens, qmap.apply(b_queries), b_types)
        hurts = after["map"] < before["map"]
        out.update(enabled=qmap.enabled, after=after, after_used=after if qmap.enabled else before,
                   hurts_on_b=hurts, stayed_off_when_hurting=(not qmap.enabled) if hurts else None,
                   cv={k: report.get(k) for k in ("before_map", "after_map", "gain", "terms_evaluated", "reason")})
    gap = out.get("gap")
    if gap is not None and gap > 0:
        out["recovered"] = None if out["after"] is None else (out["after"]["map"] - before["map"]) / gap
        out["recovered_used"] = (out["after_used"]["map"] - before["map"]) / gap
    return out


# ---------------------------------------------------------------- part 1: a new orthography

def heldout_tokens(utts: list, limit: int | None) -> Tokens:
    """Tokens of the held-out transcript split: at least MIN_LETTERS letters, at most 2 s."""
    held = split_by_transcript(utts, 0.1)[1]
    vectors, types = [], []
    for u in held[:limit] if limit else held:
        words = [(s, e, w) for s, e, w in u.words if letter_count(w) >= MIN_LETTERS and e - s <= MAX_WORD_SECONDS]
        if not words:
            continue
        x = load_audio(u)
        vectors.append(api.embed_spans(x, SAMPLE_RATE, [(s, min(e, len(x) / SAMPLE_RATE)) for s, e, _ in words]))
        types += [w for _, _, w in words]
    return Tokens(np.concatenate(vectors), np.array(types, dtype=object))


def new_orthography(args) -> dict:
    utts = load_corpus(args.corpus)
    tokens = heldout_tokens(utts, args.limit)
    types = sorted(set(tokens.types))
    rules = load_rules(RULES)
    proxy = [respell(t) for t in types]
    restored = [rules.apply(p) for p in proxy]
    exact = sum(r == t for r, t in zip(restored, types))
    marks_aside = sum(strip_marks(r) == strip_marks(t) for r, t in zip(restored, types))
    wrong = [(t, p, r) for t, p, r in zip(types, proxy, restored) if r != t]
    corpus_types = sorted({w for u in utts for _, _, w in u.words})
    corpus_exact = sum(rules.apply(respell(t)) == t for t in corpus_types)

    original, zero_shot, with_rules = (api.embed_spellings(x) for x in (types, proxy, restored))
    unmarked = api.embed_spellings([strip_marks(t) for t in types])
    rows = {"original": crossview(tokens, original, types),
            "original_marks_removed": crossview(tokens, unmarked, types),
            "proxy_zero_shot": crossview(tokens, zero_shot, types),
            "proxy_with_rules": crossview(tokens, with_rules, types)}
    result = {"tokens": len(tokens), "types": len(types), "rules_file": str(RULES.relative_to(ROOT)),
              "rules": len(rules), "rules_restore_exact": exact, "rules_restore_marks_aside": marks_aside,
              "rules_restore_failures": [list(w) for w in wrong[:10]],
              "rules_restore_corpus_types": [corpus_exact, len(corpus_types)],
              "examples": [[t, p] for t, p in list(zip(types, proxy))[:: max(1, len(types) // 8)][:8]],
              "rows": rows,
              "rules_recovery": rows["proxy_with_rules"]["map"] / rows["original"]["map"]}
    result["adaptation"] = adapt(tokens, dict(zip(types, zero_shot)), types, args.hits, args.per_term,
                                 args.seed, reference_of=dict(zip(types, original)))
    return result


# ---------------------------------------------------------------- part 2: a held-out language

SWAHILI = "sw"  # espeak-ng voice; not a key of exporters.synth.LANGUAGES
SWAHILI_CONSONANTS = ("b ch d dh f g gh h j k l m n ny ng' p r s sh t th v w y z "
                      "mb nd nj ng nz mw kw bw").split()
SWAHILI_VOWELS = "a e i o u".split()


def swahili_words(n: int, rng: np.random.Generator, exclude: set[str]) -> list[str]:
    """Pseudo-words of open syllables (Swahili has no codas), 5 to 12 letters; no 'wu' or 'wo'."""
    words: set[str] = set()
    while len(words) < n:
        syllables = []
        for k in range(int(rng.integers(2, 5))):
            bare = k == 0 and rng.random() < 0.15
            onset = "" if bare else SWAHILI_CONSONANTS[rng.integers(len(SWAHILI_CONSONANTS))]
            vowels = SWAHILI_VOWELS if not onset.endswith("w") else [v for v in SWAHILI_VOWELS if v not in "ou"]
            syllables.append(onset + vowels[rng.integers(len(vowels))])
        w = "".join(syllables)
        if MIN_LETTERS <= letter_count(w) <= 12 and plain(w) not in exclude:
            words.add(w)
    return sorted(words)


def synthetic_tokens(n_words: int, renditions: int, seed: int) -> tuple[Tokens, float]:
    """Speak the words ``renditions`` times in utterances of 3-6 words (as the training
    synthesis does, with the held-out voice); embed every token."""
    rng = np.random.default_rng(seed)
    words = swahili_words(n_words, rng, excluded_words(ROOT))
    groups = plan(SWAHILI, words, renditions, rng)
    vectors, types, seconds = [], [], 0.0
    for g, clips in zip(groups, speak_groups(groups)):
        x, spans = join([job[0] for job in g], clips, rng)
        seconds += len(x) / SAMPLE_RATE
        kept = [(s, e, w) for s, e, w in spans if e - s <= MAX_WORD_SECONDS]
        if kept:
            vectors.append(api.embed_spans(x, SAMPLE_RATE, [(s, e) for s, e, _ in kept]))
            types += [w for _, _, w in kept]
    return Tokens(np.concatenate(vectors), np.array(types, dtype=object)), seconds


def held_out_language(args) -> dict:
    assert SWAHILI not in LANGUAGES, "the held-out voice is among the training languages"
    tokens, seconds = synthetic_tokens(args.sw_words, args.renditions, args.seed)
    types = sorted(set(tokens.types))
    queries = api.embed_spellings(types)
    result = {"voice": SWAHILI, "words": args.sw_words, "renditions": args.renditions, "tokens": len(tokens),
              "types": len(types), "audio_seconds": seconds,
              "examples": types[:: max(1, len(types) // 8)][:8], "all_types": crossview(tokens, queries, types)}
    result["adaptation"] = adapt(tokens, dict(zip(types, queries)), types, args.hits, args.per_term, args.seed)
    return result


# ---------------------------------------------------------------- report

def fmt(x, digits: int = 3) -> str:
    return "-" if x is None else f"{x:.{digits}f}"


def print_table(result: dict) -> None:
    line = "-" * 78
    print(line)
    print(f"{'cross-view retrieval':44} {'MAP':>8} {'pooled AP':>10} {'types':>7} {'tokens':>7}")
    print(line)
    ortho = result.get("new_orthography")
    if ortho:
        names = {"original": "(a) Mboshi, original spelling",
                 "original_marks_removed": "    original, tone marks removed",
                 "proxy_zero_shot": "(b) proxy spelling, zero-shot",
                 "proxy_with_rules": "(c) proxy spelling + rules file"}
        for key, name in names.items():
            r = ortho["rows"][key]
            print(f"{name:44} {fmt(r['map']):>8} {fmt(r['pooled_ap']):>10} {r['types']:>7} {ortho['tokens']:>7}")
        print(f"    rules restore {ortho['rules_restore_exact']}/{ortho['types']} spellings exactly, "
              f"{ortho['rules_restore_marks_aside']}/{ortho['types']} marks aside; "
              "all corpus types: {}/{} exactly".format(*ortho["rules_restore_corpus_types"]))
        ok = ortho["rules_recovery"] >= TARGET_RULES_RECOVERY
        print(f"    rules recovery (c)/(a) = {fmt(ortho['rules_recovery'])}  "
              f"(target >= {TARGET_RULES_RECOVERY}: {'met' if ok else 'NOT met'})")
        print_adaptation(ortho["adaptation"], ortho["tokens"], "proxy, ")
        print(line)
    synth = result.get("held_out_language")
    if synth:
        r = synth["all_types"]
        print(f"{'Swahili voice (held out), all types':44} {fmt(r['map']):>8} {fmt(r['pooled_ap']):>10} "
              f"{r['types']:>7} {synth['tokens']:>7}")
        print_adaptation(synth["adaptation"], synth["tokens"], "")
        print(line)


def print_adaptation(ad: dict, n_tokens: int, spelling: str) -> None:
    rows = [("B: original spelling", ad.get("original")), (f"B: {spelling}before adaptation", ad["before"]),
            (f"B: {spelling}after (map as fitted)", ad.get("after")),
            (f"B: {spelling}as searched (map if enabled)", ad.get("after_used"))]
    for name, r in rows:
        if r is not None:
            print(f"    {name:40} {fmt(r['map']):>8} {fmt(r['pooled_ap']):>10} {r['types']:>7} {n_tokens:>7}")
    print(f"    checked sample: {ad['hits']} hits ({ad['confirmed']} confirmed) of {ad['checked_terms']} "
          f"A types, top {ad['hits_per_term']} each")
    if "refused" in ad:
        print(f"    adaptation refused: {ad['refused']}")
    else:
        cv = ad["cv"]
        print(f"    map enabled: {ad['enabled']} (cross-validated MAP {fmt(cv['before_map'])} -> "
              f"{fmt(cv['after_map'])} on {cv['terms_evaluated']} terms: {cv['reason']})")
        if ad["hurts_on_b"]:
            print(f"    the map lowers MAP on B; it stayed off: {ad['stayed_off_when_hurting']}")
    if "gap" in ad:
        tail = " (no gap to recover)"
        if "recovered_used" in ad:
            ok = ad["recovered_used"] >= TARGET_GAP_RECOVERED
            tail = (f"; recovered {fmt(ad['recovered'])} as fitted, {fmt(ad['recovered_used'])} as searched "
                    f"(target >= {TARGET_GAP_RECOVERED}: {'met' if ok else 'NOT met'})")
        print(f"    gap on B = MAP(original) - MAP(proxy zero-shot) = {fmt(ad['gap'])}{tail}")


def main(argv: list[str] | None = None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--corpus", type=Path, default=CORPUS, help="corpus in the shared layout")
    ap.add_argument("--limit", type=int, default=None, help="at most this many held-out utterances")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--hits", type=int, default=200, help="checked hits to adapt from")
    ap.add_argument("--per-term", type=int, default=5, help="top hits checked per term")
    ap.add_argument("--sw-words", type=int, default=120, help="Swahili pseudo-words")
    ap.add_argument("--renditions", type=int, default=3, help="times each pseudo-word is spoken")
    ap.add_argument("--only", choices=["orthography", "language"], default=None)
    ap.add_argument("--quick", action="store_true", help="a tiny run, for smoke tests")
    ap.add_argument("--out", type=Path, default=None, help=f"default {OUT.relative_to(ROOT)} "
                    f"({QUICK_OUT.relative_to(ROOT)} with --quick, so a smoke test keeps a real run's file)")
    args = ap.parse_args(argv)
    if args.quick:
        args.limit = args.limit or 24
        args.sw_words, args.renditions, args.hits = min(args.sw_words, 16), min(args.renditions, 2), min(args.hits, 40)
    args.out = args.out or (QUICK_OUT if args.quick else OUT)

    started = time.time()
    models = load_models()
    result: dict = {"benchmark": "language_reach", "model": {"dir": str(models.dir), "card_sha256": models.card_hash,
                                                              "created": models.card.get("created")},
                    "settings": {k: (str(v) if isinstance(v, Path) else v) for k, v in vars(args).items()}}
    if args.only != "language":
        if args.corpus.joinpath("words.tsv").exists():
            t0 = time.time()
            result["new_orthography"] = new_orthography(args)
            result["new_orthography"]["wall_seconds"] = time.time() - t0
        else:
            result["new_orthography_skipped"] = f"no corpus at {args.corpus}"
            print(f"skipping the new orthography: no corpus at {args.corpus}")
    if args.only != "orthography":
        t0 = time.time()
        result["held_out_language"] = held_out_language(args)
        result["held_out_language"]["wall_seconds"] = time.time() - t0
    result["wall_seconds"] = time.time() - started
    print_table(result)
    args.out.parent.mkdir(parents=True, exist_ok=True)
    args.out.write_text(json.dumps(result, ensure_ascii=False, indent=1) + "\n", encoding="utf-8")
    print(f"written {args.out}")
    print(json.dumps(result, ensure_ascii=False))
    return result


if __name__ == "__main__":
    main()
