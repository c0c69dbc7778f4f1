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
   archivist searches the proxy spellings of A's types and checks hits by ear (verdicts
   from the true labels) until the checked sample holds --hits hits: by default the ones
   `trawl adapt --suggest` proposes (each type's two best hits first), with --per-term K each
   type's K best; `trawl adapt`'s two levers are fitted on them and MAP on B's proxy
   spellings is measured before and after.
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
from detector.adaptation import MAX_TOLERATED_LOSS as TOLERATED_LOSS, fit_query_map  # noqa: E402
from detector.letters import dequantise, quantise  # noqa: E402
from detector.workflows import MAP_MIN_GAIN, MAP_SIGNIFICANCE  # noqa: E402
from detector.rule_learning import Evidence, fit_learned_rules, heard_letters, stretch  # noqa: E402
from detector.calibration import best_first_depth, best_first_sample  # noqa: E402
from detector.evaluation import average_precision  # noqa: E402
from detector.models import load as load_models  # noqa: E402
from detector.pooling import FRAME_SECONDS  # noqa: E402
from detector.rules import load_rules  # noqa: E402
from detector.spelling import letter_count, strip_marks, word_type  # noqa: E402
from exporters.broadcasts import DEV_FRACTION, DEV_SALT, HELD_OUT_FRACTION  # noqa: E402
from exporters.corpus import MAX_WORD_SECONDS, load_audio, load_corpus, split_by_transcript  # noqa: E402
from exporters.synth import LANGUAGES, SAMPLE_RATE, excluded_words, join, plain, plan, speak_groups  # noqa: E402

CORPUS = ROOT.parent / "shared" / "corpora" / "mboshi"
RULES = ROOT / "models" / "rules" / "mboshi-respelled.rules"
OUT = ROOT / "runs" / "bench_language_reach.json"
QUICK_OUT = ROOT / "runs" / "bench_language_reach.quick.json"
MIN_LETTERS = 5
TARGET_RULES_RECOVERY = 0.90  # MAP(proxy + rules) / MAP(original)
TARGET_GAP_RECOVERED = 0.5  # share of the zero-shot gap that adaptation must win back
BACKGROUND = 400  # random tokens standing for the archive windows `trawl adapt` samples


# ---------------------------------------------------------------- the proxy orthography

MBOSHI_VOWELS = set("aeiouεω")
OPEN_VOWELS = {"ε": "eh", "ω": "oh"}
BEFORE_C = set("aouωw")  # k is written c before these letters
HIGH_TONE = "\u0301"


def _respell(word: str, open_vowels: dict, long_mark: str, high_mark: str, consonant) -> str:
    """Shared by both proxies: vowels (open vowels renamed, length and a high tone marked after
    them), consonants through ``consonant(letter, following) -> (text, letters used)``."""
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
            out.append(open_vowels.get(letter, letter) + (long_mark if long else "") + (high_mark if high else ""))
            i += 2 if long else 1
            continue
        if high:
            raise ValueError(f"{word!r}: a tone mark on the consonant {letter!r}")
        text, used = consonant(letter, following)
        out.append(text)
        i += used
    return unicodedata.normalize("NFC", "".join(out))


def respell(word: str) -> str:
    """A Mboshi spelling in the proxy orthography (the forward direction of the rules file).

    ε -> eh, ω -> oh; a long vowel (the same vowel with the same tone twice) is written
    once with a colon; a high tone is the digit 1 after its vowel (after the colon), a
    low tone is not written; w -> ou, ny -> gn, y -> j, and k -> c before a, o, u, ω, w.
    """
    def consonant(letter, following):
        if letter == "n" and following == "y":
            return "gn", 2
        return {"y": "j", "w": "ou"}.get(letter, "c" if letter == "k" and following in BEFORE_C else letter), 1

    return _respell(word, OPEN_VOWELS, ":", "1", consonant)


def respell_dev(word: str) -> str:
    """A second invented convention, for choosing the rule learner's settings on the dev split
    (so the proxy above, on held-out words, stays untuned): ε -> è, ω -> ô; a long vowel is
    written once followed by h; a high tone is an apostrophe after its vowel; ny -> ñ,
    k -> q, w -> u."""
    def consonant(letter, following):
        if letter == "n" and following == "y":
            return "ñ", 2
        return {"k": "q", "w": "u"}.get(letter, letter), 1

    return _respell(word, {"ε": "è", "ω": "ô"}, "h", "'", consonant)


# ---------------------------------------------------------------- measures

@dataclass
class Tokens:
    """Embedded word tokens: one unit vector and one word type per token."""

    vectors: np.ndarray  # (n, d)
    types: np.ndarray  # (n,) object: the word type of each token
    regions: list = None  # per token, letter log-probs over its stretch (REGION_MARGIN either side)
    archive: str = ""  # the letters the model hears in all the tokens' utterances (greedy decoding)

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
                   per_term: int) -> list[tuple[str, int, bool]]:
    """The archivist's checking, simulated, with verdicts from the true labels: with ``per_term``
    0, the sample `trawl adapt --suggest` proposes (detector.calibration.best_first_sample: each
    type's two best tokens, in ``order``, then each type's next two, ... until ``n_hits``); otherwise the
    ``per_term`` best tokens of each type in ``order`` until the sample holds ``n_hits`` hits (the
    protocol of earlier releases). Returns (type, token index, confirmed) per checked hit."""
    depth = per_term or best_first_depth(n_hits, len(order))
    terms = order[: -(-n_hits // per_term)] if per_term else order
    ranked = [[(t, int(i), bool(tokens.types[i] == t))
               for i in np.argsort(-(tokens.vectors @ queries[t]), kind="stable")[:depth]] for t in terms]
    return best_first_sample(ranked, n_hits)


def background(tokens: Tokens, checked: list[tuple[str, int, bool]], rng: np.random.Generator) -> np.ndarray:
    """Up to BACKGROUND random tokens standing for the random archive windows `trawl adapt` samples.

    In an archive of hundreds of hours a random window almost never holds a checked hit or
    another occurrence of a checked term; among a few hundred corpus tokens it often would
    (the hit itself, drawn again, counted against its own term). So the checked hits and the
    tokens of the checked terms are left out of the draw."""
    checked_types, checked_tokens = {t for t, _, _ in checked}, {i for _, i, _ in checked}
    pool = np.array([i for i in range(len(tokens)) if tokens.types[i] not in checked_types and i not in checked_tokens])
    return np.sort(rng.choice(pool, min(BACKGROUND, len(pool)), replace=False))


def halves(types: list[str], seed: int) -> tuple[list[str], list[str]]:
    """Types dealt into halves A (checked) and B (evaluated), A in checking order."""
    order = np.random.default_rng(seed).permutation(len(types))
    shuffled = [types[i] for i in order]
    cut = len(shuffled) // 2
    return shuffled[:cut], sorted(shuffled[cut:])


def adapt(tokens: Tokens, spelling_of: dict[str, str], types: list[str], n_hits: int, per_term: int,
          seed: int, original: bool = False) -> dict:
    """Adapt from checked hits of half the types; MAP of the other half before and after.

    ``spelling_of``: how the archivist types each type (no rules file). The two levers of
    `trawl adapt`, in its order: learned rules (detector/rule_learning.py), then the query
    map (detector/adaptation.py) on the respelled queries; each is used only when its own
    cross-validation over the checked terms says so. ``original``: also measure B in the
    model's own spelling, for the gap.
    """
    a_types, b_types = halves(types, seed)
    zero = dict(zip(types, api.embed_spellings([spelling_of[t] for t in types])))
    checked = checked_sample(tokens, zero, a_types, n_hits, per_term)
    rng = np.random.default_rng(seed)
    bg = background(tokens, checked, rng)
    m = load_models()
    ev = Evidence([spelling_of[t] for t, _, _ in checked], tokens.vectors[[i for _, i, _ in checked]],
                  [tokens.regions[i] for _, i, _ in checked], np.array([c for _, _, c in checked]),
                  tokens.vectors[bg], [tokens.regions[i] for i in bg], tokens.archive, m.letter_table,
                  m.alphabet, api.embed_spellings, m.marks)
    out: dict = {"types_a": len(a_types), "types_b": len(b_types), "hits": len(checked),
                 "confirmed": int(ev.confirmed.sum()), "checked_terms": len(set(ev.terms)),
                 "confirmed_terms": len({t for t, _, c in checked if c}), "hits_per_term": per_term}
    b_spelled = [spelling_of[t] for t in b_types]
    out["before"] = crossview(tokens, np.stack([zero[t] for t in b_types]), b_types)
    if original:
        out["original"] = crossview(tokens, api.embed_spellings(b_types), b_types)
        out["gap"] = out["original"]["map"] - out["before"]["map"]

    learned = fit_learned_rules(ev, seed=seed)
    rs = learned.ruleset()
    out["rules"] = {"learned": learned.rules_text.splitlines(), "enabled": learned.enabled,
                    "cv": {k: learned.report.get(k) for k in ("before_map", "after_map", "terms_evaluated", "reason")}}
    b_rules = [rs.apply(w) for w in b_spelled]
    out["after_rules"] = crossview(tokens, api.embed_spellings(b_rules), b_types)
    use_rules = learned.enabled
    respelled = {w: (rs.apply(w) if use_rules else w) for w in set(ev.terms)}
    q = api.embed_spellings([respelled[w] for w in ev.terms])
    b_used = api.embed_spellings(b_rules if use_rules else b_spelled)
    try:
        qmap, report = fit_query_map(q, ev.vectors, ev.confirmed.astype(int), ev.terms, seed=seed,
                                     background=ev.background_vectors, min_gain=MAP_MIN_GAIN,
                                     significance=MAP_SIGNIFICANCE)
    except TrawlError as exc:  # too few hits, terms or confirmations: search keeps the identity
        out["map"] = {"refused": str(exc), "enabled": False}
        out["after_used"] = crossview(tokens, b_used, b_types)
    else:
        out["map"] = {"enabled": qmap.enabled,
                      "cv": {k: report.get(k) for k in ("before_map", "after_map", "terms_evaluated", "reason")}}
        out["after_map"] = crossview(tokens, qmap.apply(b_used), b_types)
        out["after_used"] = crossview(tokens, qmap.apply(b_used) if qmap.enabled else b_used, b_types)
    gap = out.get("gap")
    if gap is not None and gap > 0:
        for key in ("after_rules", "after_map", "after_used"):
            if key in out:
                out[f"recovered_{key[6:]}"] = (out[key]["map"] - out["before"]["map"]) / gap
    out["hurts"] = out["after_used"]["map"] < out["before"]["map"] - TOLERATED_LOSS
    return out


# ---------------------------------------------------------------- part 1: a new orthography

def corpus_tokens(utts: list, limit: int | None, split: str) -> Tokens:
    """Tokens of the held-out (or dev) transcript split: at least MIN_LETTERS letters, at most 2 s."""
    train, held = split_by_transcript(utts, HELD_OUT_FRACTION)
    if split == "dev":
        held = split_by_transcript(train, DEV_FRACTION, salt=DEV_SALT)[1]
    vectors, types, regions, heard = [], [], [], []
    m = load_models()
    for u in held[:limit] if limit else held:
        words = [(s, e, w) for s, e, w in u.words if letter_count(w) >= MIN_LETTERS and e - s <= MAX_WORD_SECONDS]
        if not words:
            continue
        x = load_audio(u)
        spans = [(s, min(e, len(x) / SAMPLE_RATE)) for s, e, _ in words]
        vectors.append(api.embed_spans(x, SAMPLE_RATE, spans))
        logp = dequantise(quantise(api.letter_posteriors(x, SAMPLE_RATE)))  # as the index stores them
        regions += [stretch(logp, s, e, FRAME_SECONDS) for s, e in spans]
        heard.append(heard_letters(logp, m.alphabet))
        types += [w for _, _, w in words]
    return Tokens(np.concatenate(vectors), np.array(types, dtype=object), regions, " ".join(heard))


def new_orthography(args) -> dict:
    utts = load_corpus(args.corpus)
    tokens = corpus_tokens(utts, args.limit, args.split)
    types = sorted(set(tokens.types))
    to_proxy = respell_dev if args.split == "dev" else respell
    proxy = [to_proxy(t) for t in types]
    result = {"split": args.split, "tokens": len(tokens), "types": len(types),
              "examples": [[t, p] for t, p in list(zip(types, proxy))[:: max(1, len(types) // 8)][:8]]}
    original, zero_shot = api.embed_spellings(types), api.embed_spellings(proxy)
    rows = {"original": crossview(tokens, original, types),
            "original_marks_removed": crossview(tokens, api.embed_spellings([strip_marks(t) for t in types]), types),
            "proxy_zero_shot": crossview(tokens, zero_shot, types)}
    if args.split == "heldout":
        rules = load_rules(RULES)
        restored = [rules.apply(p) for p in proxy]
        wrong = [(t, p, r) for t, p, r in zip(types, proxy, restored) if r != t]
        corpus_types = sorted({w for u in utts for _, _, w in u.words})
        rows["proxy_with_rules"] = crossview(tokens, api.embed_spellings(restored), types)
        result.update(rules_file=str(RULES.relative_to(ROOT)), rules=len(rules),
                      rules_restore_exact=sum(r == t for r, t in zip(restored, types)),
                      rules_restore_marks_aside=sum(strip_marks(r) == strip_marks(t) for r, t in zip(restored, types)),
                      rules_restore_failures=[list(w) for w in wrong[:10]],
                      rules_restore_corpus_types=[sum(rules.apply(respell(t)) == t for t in corpus_types),
                                                  len(corpus_types)],
                      rules_recovery=rows["proxy_with_rules"]["map"] / rows["original"]["map"])
    result["rows"] = rows
    result["adaptation"] = [adapt(tokens, dict(zip(types, proxy)), types, args.hits, args.per_term, seed,
                                  original=True) for seed in seeds(args)]
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
    vectors, types, regions, heard, seconds = [], [], [], [], 0.0
    fs = FRAME_SECONDS
    for g, clips in zip(groups, speak_groups(groups)):
        x, spans = join([job[0] for job in g], clips, rng)
        seconds += len(x) / SAMPLE_RATE
        kept = [(s, e, w) for s, e, w in spans if e - s <= MAX_WORD_SECONDS]
        if kept:
            vectors.append(api.embed_spans(x, SAMPLE_RATE, [(s, e) for s, e, _ in kept]))
            logp = dequantise(quantise(api.letter_posteriors(x, SAMPLE_RATE)))
            regions += [stretch(logp, s, e, fs) for s, e, _ in kept]
            heard.append(heard_letters(logp, load_models().alphabet))
            types += [w for _, _, w in kept]
    return Tokens(np.concatenate(vectors), np.array(types, dtype=object), regions, " ".join(heard)), seconds


def held_out_language(args) -> dict:
    assert SWAHILI not in LANGUAGES, "the held-out voice is among the training languages"
    tokens, seconds = synthetic_tokens(args.sw_words, args.renditions, args.seed)
    types = sorted(set(tokens.types))
    queries = api.embed_spellings(types)
    result = {"voice": SWAHILI, "words": args.sw_words, "renditions": args.renditions, "tokens": len(tokens),
              "types": len(types), "audio_seconds": seconds,
              "examples": types[:: max(1, len(types) // 8)][:8], "all_types": crossview(tokens, queries, types)}
    result["adaptation"] = [adapt(tokens, {t: t for t in types}, types, args.hits, args.per_term, seed)
                            for seed in seeds(args)]
    return result


def seeds(args) -> list[int]:
    return list(range(args.seed, args.seed + args.seeds))


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
        print(f"[{ortho['split']} split]")
        for key, name in names.items():
            if key in ortho["rows"]:
                r = ortho["rows"][key]
                print(f"{name:44} {fmt(r['map']):>8} {fmt(r['pooled_ap']):>10} {r['types']:>7} {ortho['tokens']:>7}")
        if "rules_recovery" in ortho:
            print(f"    rules restore {ortho['rules_restore_exact']}/{ortho['types']} spellings exactly, "
                  f"{ortho['rules_restore_marks_aside']}/{ortho['types']} marks aside; "
                  "all corpus types: {}/{} exactly".format(*ortho["rules_restore_corpus_types"]))
            ok = ortho["rules_recovery"] >= TARGET_RULES_RECOVERY
            print(f"    rules recovery (c)/(a) = {fmt(ortho['rules_recovery'])}  "
                  f"(target >= {TARGET_RULES_RECOVERY}: {'met' if ok else 'NOT met'})")
        print_adaptation(ortho["adaptation"])
        print(line)
    synth = result.get("held_out_language")
    if synth:
        r = synth["all_types"]
        print(f"{'Swahili voice (held out), all types':44} {fmt(r['map']):>8} {fmt(r['pooled_ap']):>10} "
              f"{r['types']:>7} {synth['tokens']:>7}")
        print_adaptation(synth["adaptation"])
        print(line)


def print_adaptation(runs: list[dict]) -> None:
    """One line per A/B deal (seed), then the mean."""
    print("    adaptation from checked hits of half the types (A), MAP on the other half (B), per deal:")
    print(f"    {'deal':>4} {'hits':>5} {'conf':>5} {'orig':>6} {'before':>7} {'rules':>6} {'+map':>6} {'used':>6} "
          f"{'recov':>6}  rules on / map on")
    for k, ad in enumerate(runs):
        print(f"    {k:>4} {ad['hits']:>5} {ad['confirmed']:>5} {fmt(ad.get('original', {}).get('map')):>6} "
              f"{fmt(ad['before']['map']):>7} {fmt(ad['after_rules']['map']):>6} "
              f"{fmt(ad.get('after_map', {}).get('map')):>6} {fmt(ad['after_used']['map']):>6} "
              f"{fmt(ad.get('recovered_used')):>6}  {ad['rules']['enabled']!s:>5} / {ad['map']['enabled']!s:<5} "
              f"{' '.join(ad['rules']['learned'][:6])}")
    before = float(np.mean([ad["before"]["map"] for ad in runs]))
    used = float(np.mean([ad["after_used"]["map"] for ad in runs]))
    learned = float(np.mean([ad["after_rules"]["map"] for ad in runs]))
    up = sum(ad["after_rules"]["map"] > ad["before"]["map"] for ad in runs)
    worst = min(ad["after_used"]["map"] - ad["before"]["map"] for ad in runs)
    tail, tail_learned = "", ""
    if all("gap" in ad for ad in runs):
        gap = float(np.mean([ad["gap"] for ad in runs]))
        rec = (used - before) / gap if gap > 0 else None
        ok = rec is not None and rec >= TARGET_GAP_RECOVERED
        tail = (f"; gap {fmt(gap)}, recovered {fmt(rec)} of it "
                f"(target >= {TARGET_GAP_RECOVERED}: {'met' if ok else 'NOT met'})")
        tail_learned = f", {fmt((learned - before) / gap if gap > 0 else None)} of the gap"
    print(f"    mean over {len(runs)} deals: B MAP {fmt(before)} -> {fmt(used)} as searched{tail}")
    print(f"    with the learned rules as learned (switched on or not): B MAP {fmt(learned)}{tail_learned}; "
          f"B up in {up} of {len(runs)} deals")
    print(f"    worst change of B MAP {worst:+.3f} (never worse than -{TOLERATED_LOSS}: "
          f"{'met' if worst >= -TOLERATED_LOSS else 'NOT met'})")


def main(argv: list[str] | None = None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--corpus", type=Path, default=CORPUS, help="corpus in the shared layout")
    ap.add_argument("--limit", type=int, default=None, help="at most this many held-out utterances")
    ap.add_argument("--seed", type=int, default=0, help="first A/B deal")
    ap.add_argument("--seeds", type=int, default=5, help="A/B deals of the types (seeds seed, seed+1, ...)")
    ap.add_argument("--split", choices=["heldout", "dev"], default="heldout",
                    help="dev: the dev split with a second invented convention, for choosing settings")
    ap.add_argument("--hits", type=int, default=200, help="checked hits to adapt from")
    ap.add_argument("--per-term", type=int, default=0,
                    help="top hits checked per term (0: as `trawl adapt --suggest` proposes, the two best of each term first)")
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
        args.seeds = 1
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
