"""Learned respelling rules: query-side adaptation from checked hits, written as ordinary rules.

An archivist's own spelling habits (a digraph for one sound, a letter the model reads as
another) misplace a term's query. The checked sample says which stretches of audio a
term really names; the letter posteriors stored in the index say which letters the
model hears there. From the two we learn rewrite rules in the syntax of detector/rules.py,
so that what was learned can be read, stored and edited like a hand-written rules file.

1. Candidates. Each confirmed hit's stretch is decoded greedily (CTC best path) into the
   model's letters and aligned to the term's spelling by edit distance (Levenshtein);
   every pair of a substring of the spelling (1-3 characters) and the letters aligned to
   it that differ is a candidate rule (phrase pairs consistent with an alignment, as in
   phrase-based translation: Koehn et al., NAACL 2003). Greedy CTC decoding merges a
   repeated letter, so a pair that drops a letter after another (``ah -> a``) is also
   proposed as a doubling (``ah -> aa``: a length sign). Signs the letter head cannot hear
   at all (digits, punctuation: a typed tone or length sign) get candidates of their own
   (`sign_pairs`): each combining mark the spelling encoder reads, a doubling of the letter
   before, or nothing.
2. Evidence. A spelling's fit to a term's confirmed hits is measured in both views the
   search uses, each as the log-probability of ranking each confirmed hit above a
   background of other audio (the rejected hits and random archive windows):
   cosine / TEMPERATURE for the spelling embedding against the hit's window vector, and
   the keyword alignment cost per letter (detector/letters.py) for the letter view.
   A candidate's gain is the change of that sum over the terms it respells.
3. Selection. Greedy forward selection: the candidate with the largest gain is appended
   while its gain exceeds MIN_GAIN and it helps at least MIN_SHARE of the terms it
   changes; a rule must change at least MIN_SUPPORT confirmed terms, or one when its left
   side is foreign to the archive (its rate in the archive's decoded letters is below
   FOREIGN_RATIO of its rate in the sample's typed terms: such a spelling cannot be how
   the model hears anything). Candidates are re-derived after each rule, so rules chain.
4. Honesty. Cross-validation over terms (folds dealt by term, the deal repeated REPEATS
   times): rules learned without a fold's terms are applied to them, and each held-out term's
   confirmed hits are ranked by cosine to its spelling among every other hit of the sample
   and the background, before and after (the embedding view: it decides what a search
   fetches). Reported: the mean AP (MAP) both ways. The rules are enabled when the held-out
   ranking improves by either of two measures, MAP or the confirmed hits' log-likelihood
   of the ranking (its smooth form: with one or two confirmed hits per term, AP moves in
   big steps), and held-out MAP drops by no more than MAX_TOLERATED_LOSS (0.02). The held-out
   MTWV is estimated too (evaluation.sampled_mtwv) and reported, not used to switch: a checked
   sample does not know the occurrences the search never offered.

Pure functions and a small dataclass; `embed` (spellings -> unit vectors) is passed in.
"""

from __future__ import annotations

import unicodedata
from dataclasses import dataclass, field
from datetime import datetime, timezone
from typing import Any, Callable, Sequence

import numpy as np
from scipy.special import logsumexp

from . import TrawlError
from .evaluation import ranked_ap, sampled_mtwv
from .adaptation import MAX_TOLERATED_LOSS
from .letters import LETTER_FLOOR, keyword_scores, letter_ids, per_letter
from .rules import Rule, RuleSet, parse_rules

FORMAT_VERSION = 1
LEARNED_RULES_FILE = "learned_rules.json"  # beside the index's other settings
TEMPERATURE = 0.05  # cosine scale of the embedding view (its scores are cosines in [-1, 1])
MAX_SPAN = 3  # longest left side of a candidate, in characters
MIN_SUPPORT = 2
MIN_GAIN = 1.0  # nats, summed over the changed terms' confirmed hits
MIN_SHARE = 0.6
FOREIGN_RATIO = 0.2
MAX_RULES = 20
LETTER_SHORTLIST = 24  # candidates, best by the embedding view, whose letter view is computed
REPEATS = 3  # deals of the terms into folds, for the held-out check
REGION_MARGIN = 0.06  # seconds of audio either side of a checked hit's stretch
FORBIDDEN = set("#^$") | {" ", "\t"}

Embed = Callable[[list[str]], np.ndarray]


# ------------------------------------------------------------------ letters heard, aligned to letters typed

def heard_letters(logp: np.ndarray, alphabet: Sequence[str]) -> str:
    """Greedy CTC decoding (best path, repeats merged, blanks dropped) of (T, 1 + letters) log-probs."""
    best = np.asarray(logp).argmax(axis=1)
    out, prev = [], -1
    for b in best:
        if b != prev and b != 0:
            out.append(alphabet[b - 1])
        prev = b
    return "".join(out)


def stretch(logp: np.ndarray, start: float, end: float, frame_seconds: float) -> np.ndarray:
    """The rows of per-frame log-probs covering start..end seconds, REGION_MARGIN either side."""
    lo = max(0, int(np.floor((start - REGION_MARGIN) / frame_seconds + 1e-9)))
    hi = min(len(logp), int(np.ceil((end + REGION_MARGIN) / frame_seconds - 1e-9)))
    return np.asarray(logp[lo:max(hi, lo + 1)], np.float32)


def edit_alignment(a: str, b: str) -> list[tuple[int | None, int | None]]:
    """One minimum-cost Levenshtein alignment of a to b: pairs (i, j), (i, None) deletions, (None, j) insertions."""
    n, m = len(a), len(b)
    d = np.zeros((n + 1, m + 1), np.int64)
    d[:, 0], d[0, :] = np.arange(n + 1), np.arange(m + 1)
    for i in range(1, n + 1):
        for j in range(1, m + 1):
            d[i, j] = min(d[i - 1, j] + 1, d[i, j - 1] + 1, d[i - 1, j - 1] + (a[i - 1] != b[j - 1]))
    pairs: list[tuple[int | None, int | None]] = []
    i, j = n, m
    while i or j:
        if i and j and d[i, j] == d[i - 1, j - 1] + (a[i - 1] != b[j - 1]):
            pairs.append((i - 1, j - 1))
            i, j = i - 1, j - 1
        elif i and d[i, j] == d[i - 1, j] + 1:
            pairs.append((i - 1, None))
            i -= 1
        else:
            pairs.append((None, j - 1))
            j -= 1
    return pairs[::-1]


def phrase_pairs(typed: str, heard: str, max_span: int = MAX_SPAN) -> set[tuple[str, str]]:
    """(typed substring, heard substring) pairs consistent with an alignment, where the two differ.

    Inserted heard letters belong to the typed character before them (or the first). A
    typed span maps to the heard letters aligned to its characters when they are one
    contiguous run (or none: a deletion)."""
    if not typed:
        return set()
    owned: list[list[int]] = [[] for _ in typed]
    last = 0
    for i, j in edit_alignment(typed, heard):
        if i is not None:
            last = i
        if j is not None:
            owned[i if i is not None else last].append(j)
    out = set()
    for a in range(len(typed)):
        for b in range(a + 1, min(len(typed), a + max_span) + 1):
            js = sorted(j for k in range(a, b) for j in owned[k])
            if js and js != list(range(js[0], js[-1] + 1)):
                continue
            src, tgt = typed[a:b], "".join(heard[j] for j in js)
            if src != tgt and len(tgt) <= max_span and not (set(src + tgt) & FORBIDDEN) and not src[0].isspace():
                out.add((src, tgt))
                if len(src) == 2 and tgt == src[0] and src[1].isalpha():
                    out.add((src, src[0] * 2))  # heard once: greedy decoding merges a doubled letter
    return out


def sign_pairs(typed: str, marks: Sequence[str]) -> set[tuple[str, str]]:
    """Candidates for the signs in a typed spelling that are neither letters nor marks (digits,
    colons, apostrophes: how keyboards write tone and length). For each sign c: c -> nothing;
    xc -> xx when the letter x comes just before it (a length sign); c -> m for each combining
    mark m in `marks` when a letter comes before it in its word, perhaps through other signs
    (a tone sign: the spelling encoder drops digits and colons, so the mark reaches that letter)."""
    out = set()
    after_letter = False  # a letter comes before, perhaps with other signs between
    for k, c in enumerate(typed):
        if c.isspace():
            after_letter = False
        if c.isalpha() or c.isspace() or unicodedata.combining(c) or c in FORBIDDEN:
            after_letter = after_letter or c.isalpha()
            continue
        out.add((c, ""))
        if typed[k - 1: k].isalpha():
            out.add((typed[k - 1] + c, typed[k - 1] * 2))
        if after_letter:
            out.update((c, m) for m in marks)
    return out


# ------------------------------------------------------------------ the checked sample, as evidence

@dataclass
class Evidence:
    """A checked sample with the audio the search sees: vectors and letter posteriors.

    terms[i]: the spelling of hit i's term (after the archivist's own rules); vectors[i]:
    the hit's window vector; regions[i]: letter log-probs over the hit's stretch;
    confirmed[i]: the verdict. background_*: other archive audio (random windows)."""

    terms: list[str]
    vectors: np.ndarray
    regions: list[np.ndarray]
    confirmed: np.ndarray
    background_vectors: np.ndarray
    background_regions: list[np.ndarray]
    archive_letters: str  # the archive's decoded letters (a sample), for the foreign-spelling test
    table: dict[str, int]
    alphabet: list[str]
    embed: Embed
    marks: Sequence[str] = ()  # the combining marks the spelling encoder reads (candidates for signs)
    archive_seconds: float = 0.0  # the archive's duration, for the held-out MTWV estimate (0: not estimated)
    _emb: dict = field(default_factory=dict, repr=False)
    _views: dict = field(default_factory=dict, repr=False)

    def __post_init__(self):
        self.confirmed = np.asarray(self.confirmed, bool)
        self.terms_arr = np.array(self.terms, dtype=object)

    def spelled_vector(self, s: str) -> np.ndarray:
        if s not in self._emb:
            self._emb[s] = self.embed([s])[0]
        return self._emb[s]

    def indices(self, term: str, confirmed: bool | None = None) -> np.ndarray:
        m = self.terms_arr == term
        if confirmed is not None:
            m &= self.confirmed == confirmed
        return np.flatnonzero(m)

    def negatives(self, term: str) -> np.ndarray:
        """Rejected hits of any term and confirmed hits of other terms (indices into the sample)."""
        return np.flatnonzero(~self.confirmed | (self.terms_arr != term))

    def embedding_scores(self, term: str, s: str, hits: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Embedding evidence of spelling s for `hits` and for the term's negatives, then the background."""
        q = self.spelled_vector(s)
        e_neg = np.concatenate([self.vectors[self.negatives(term)] @ q, self.background_vectors @ q])
        return self.vectors[hits] @ q / TEMPERATURE, e_neg / TEMPERATURE

    def views(self, term: str, s: str, hits: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """Embedding and letter evidence of spelling s for `hits` and for the term's negatives, then
        the background (the background's entries are the last ones of the negatives' arrays)."""
        key = (term, s, tuple(hits.tolist()))
        if key not in self._views:
            e_hit, e_neg = self.embedding_scores(term, s, hits)
            ids = letter_ids(s, self.table)
            if ids:
                regs = [self.regions[i] for i in hits] + [self.regions[i] for i in self.negatives(term)]
                cost, _, _ = keyword_scores(regs + list(self.background_regions), ids)
                ev = per_letter(cost, len(ids))
                l_hit, l_neg = ev[: len(hits)], ev[len(hits):]
            else:
                l_hit, l_neg = np.full(len(hits), LETTER_FLOOR), np.full(len(e_neg), LETTER_FLOOR)
            self._views[key] = (e_hit, e_neg, l_hit, l_neg)
        return self._views[key]

    def embedding_fit(self, term: str, s: str) -> float:
        return _rank_loglik(*self.embedding_scores(term, s, self.indices(term, True)))

    def letter_fit(self, term: str, s: str) -> float:
        _, _, l_hit, l_neg = self.views(term, s, self.indices(term, True))
        return _rank_loglik(l_hit, l_neg)


def _rank_loglik(pos: np.ndarray, neg: np.ndarray) -> float:
    """Sum over positives of log softmax(positive among itself and the negatives)."""
    if not len(pos):
        return 0.0
    z = logsumexp(neg) if len(neg) else -np.inf
    return float(np.sum(pos - np.logaddexp(pos, z)))


def is_foreign(src: str, typed: str, archive: str) -> bool:
    """True when src's letters (one or two) are rarer in the archive's decoded letters than
    FOREIGN_RATIO times their rate in the typed terms (or src has no letters: digits and marks
    are never heard)."""
    core = _letters_only(src)
    if not core:
        return True
    if len(core) > 2:
        return False  # a longer run is rare anywhere: rarity says nothing about a convention
    typed = _letters_only(typed, keep_spaces=True)
    if not archive or not typed:
        return False
    return archive.count(core) / len(archive) < FOREIGN_RATIO * typed.count(core) / len(typed)


def _letters_only(text: str, keep_spaces: bool = False) -> str:
    return "".join(c for c in text if c.isalpha() or (keep_spaces and c.isspace()))


# ------------------------------------------------------------------ greedy rule induction

def _apply(rules: list[Rule], s: str) -> str | None:
    """s respelled by rules; None when the rules would leave it without letters."""
    try:
        return RuleSet(tuple(rules)).apply(s) if rules else s
    except TrawlError:
        return None


def learn_rules(ev: Evidence, terms: Sequence[str] | None = None, max_rules: int = MAX_RULES,
                log: Callable[[str], None] | None = None) -> list[Rule]:
    """Rules learned from the confirmed hits of `terms` (default: every term of the sample)."""
    pool = sorted({t for t, c in zip(ev.terms, ev.confirmed) if c} & set(terms if terms is not None else ev.terms))
    if not pool:
        return []
    typed = " ".join(sorted(set(terms if terms is not None else ev.terms)))
    heard = {i: heard_letters(ev.regions[i], ev.alphabet) for t in pool for i in ev.indices(t, True)}
    rules: list[Rule] = []
    spelled = {t: t for t in pool}
    for _ in range(max_rules):
        candidates = {pair for t in pool for i in ev.indices(t, True) for pair in phrase_pairs(spelled[t], heard[i])}
        candidates |= {pair for t in pool for pair in sign_pairs(spelled[t], ev.marks)}
        shortlist = []
        for src, tgt in sorted(candidates):
            rule = Rule(src, tgt)
            need = 1 if is_foreign(src, typed, ev.archive_letters) else MIN_SUPPORT
            changed = {}
            for t in pool:
                new = _apply([rule], spelled[t])
                if new is None:
                    changed = {}
                    break
                if new != spelled[t]:
                    changed[t] = new
            if len(changed) < need:
                continue
            gain = np.array([ev.embedding_fit(t, new) - ev.embedding_fit(t, spelled[t]) for t, new in changed.items()])
            if gain.sum() > 0:
                shortlist.append((float(gain.sum()), rule, changed, gain))
        shortlist.sort(key=lambda x: (-x[0], x[1].left, x[1].right))  # ties in a fixed order: the same sample, the same rules
        best = None
        for _g, rule, changed, gain in shortlist[:LETTER_SHORTLIST]:
            total = gain + np.array([ev.letter_fit(t, new) - ev.letter_fit(t, spelled[t]) for t, new in changed.items()])
            if total.sum() > MIN_GAIN and np.mean(total > 0) >= MIN_SHARE and (best is None or total.sum() > best[0]):
                best = (float(total.sum()), rule, changed)
        if best is None:
            break
        rules.append(best[1])
        spelled.update(best[2])
        if log:
            log(f"{best[1].to_text()}  (+{best[0]:.1f} over {len(best[2])} terms)")
    return rules


def held_out_scores(ev: Evidence, term: str, s: str) -> tuple[float, float] | None:
    """(AP, log-likelihood) of the term's confirmed hits, by cosine to spelling s, ranked among
    every other hit of the sample (rejected hits of any term, confirmed hits of other terms) and
    the background; None when the term has no confirmed hit.

    The embedding view is the one judged: it decides which windows a search fetches at all (the
    letter pass only re-ranks what it fetched), and it is what the language benchmark measures."""
    conf = ev.indices(term, True)
    if not len(conf):
        return None
    pos, neg = ev.embedding_scores(term, s, conf)
    return ranked_ap(pos, neg), _rank_loglik(pos, neg)  # the log-likelihood is embedding_fit's


def _twv_scores(ev: Evidence, term: str, s: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Cosines of spelling s to the term's confirmed hits, to every other checked hit, to the background."""
    pos, neg = ev.embedding_scores(term, s, ev.indices(term, True))
    n_checked = len(ev.negatives(term))
    return pos * TEMPERATURE, neg[:n_checked] * TEMPERATURE, neg[n_checked:] * TEMPERATURE


def cross_validate(ev: Evidence, folds: int = 5, seed: int = 0, repeats: int = REPEATS) -> dict[str, list[float]]:
    """Per held-out term (with a confirmed hit) and per repeat: AP and log-likelihood before and after
    the rules learned without its fold; per repeat, when the archive's duration is known, the MTWV
    estimate over the held-out terms (evaluation.sampled_mtwv, one threshold on the cosine). Each
    repeat deals the terms into folds afresh (repeated cross-validation: with a few dozen terms one
    deal's estimate is noisy)."""
    terms = sorted(set(ev.terms))
    k = min(folds, len(terms))
    before = {t: held_out_scores(ev, t, t) for t in terms}  # the typed spelling's scores: the same in every fold
    out: dict[str, list[float]] = {"ap_before": [], "ap_after": [], "ll_before": [], "ll_after": [],
                                   "mtwv_before": [], "mtwv_after": []}
    for r in range(repeats):
        order = np.random.default_rng(seed + 1000 * r).permutation(len(terms))
        fold_of = {terms[j]: pos % k for pos, j in enumerate(order)}
        twv_before, twv_after = [], []
        for f in range(k):
            rules = learn_rules(ev, [t for t in terms if fold_of[t] != f])
            for t in terms:
                if fold_of[t] != f:
                    continue
                b = before[t]
                if b is None:
                    continue
                new = _apply(rules, t) or t
                a = held_out_scores(ev, t, new) if new != t else b
                for key, v in zip(("ap_before", "ap_after", "ll_before", "ll_after"), (b[0], a[0], b[1], a[1])):
                    out[key].append(v)
                if ev.archive_seconds > 0:
                    twv_before.append(_twv_scores(ev, t, t))
                    twv_after.append(_twv_scores(ev, t, new))
        if twv_before:
            out["mtwv_before"].append(sampled_mtwv(twv_before, ev.archive_seconds)[0])
            out["mtwv_after"].append(sampled_mtwv(twv_after, ev.archive_seconds)[0])
    return out


# ------------------------------------------------------------------ stored form

@dataclass
class LearnedRules:
    rules_text: str
    enabled: bool
    report: dict
    sample_hash: str = ""
    created: str = ""
    format_version: int = FORMAT_VERSION

    def ruleset(self) -> RuleSet:
        return parse_rules(self.rules_text, "rules learned by trawl adapt")

    def to_dict(self) -> dict[str, Any]:
        return {"format_version": self.format_version, "kind": "learned_rules", "created": self.created,
                "sample_hash": self.sample_hash, "enabled": self.enabled, "rules": self.rules_text,
                "report": self.report}

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> "LearnedRules":
        if d.get("kind") != "learned_rules" or int(d.get("format_version", 0)) != FORMAT_VERSION:
            raise TrawlError("the learned rules stored in the index are of an unknown format; run trawl adapt again")
        return cls(d["rules"], bool(d["enabled"]), d.get("report", {}), d.get("sample_hash", ""), d.get("created", ""))


def fit_learned_rules(ev: Evidence, folds: int = 5, seed: int = 0) -> LearnedRules:
    """Learn rules from the whole sample; enable them when cross-validated held-out MAP does not drop."""
    rules = learn_rules(ev)
    text = "".join(r.to_text() + "\n" for r in rules)
    report: dict[str, Any] = {"rules": len(rules), "confirmed": int(ev.confirmed.sum()), "hits": len(ev.terms),
                              "terms": len(set(ev.terms)), "folds": folds, "seed": seed}
    if not rules:
        report.update(enabled=False, before_map=None, after_map=None, terms_evaluated=0,
                      reason="no rule improved the confirmed hits' evidence")
        return LearnedRules(text, False, report, created=_now())
    cv = cross_validate(ev, folds, seed)
    report["terms_evaluated"] = len(cv["ap_before"]) // REPEATS
    report["repeats"] = REPEATS
    if not cv["ap_before"]:
        report.update(enabled=False, before_map=None, after_map=None,
                      reason="no term has a confirmed hit to check the rules on")
        return LearnedRules(text, False, report, created=_now())
    b, a = float(np.mean(cv["ap_before"])), float(np.mean(cv["ap_after"]))
    gain = float(np.sum(cv["ll_after"]) - np.sum(cv["ll_before"]))
    better = a > b or gain > 0
    enabled = better and a >= b - MAX_TOLERATED_LOSS
    if cv["mtwv_before"]:
        report.update(before_mtwv=float(np.mean(cv["mtwv_before"])), after_mtwv=float(np.mean(cv["mtwv_after"])))
    report.update(before_map=b, after_map=a, gain=a - b, held_out_loglik_gain=gain, enabled=enabled,
                  reason="held-out terms' confirmed hits rank higher" if enabled else
                  f"held-out MAP would drop from {b:.3f} to {a:.3f}" if better else
                  "held-out terms' confirmed hits do not rank higher with the rules")
    return LearnedRules(text, enabled, report, created=_now())


def _now() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="seconds")

