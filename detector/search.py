"""Search: a typed term (or examples) -> query vector -> HNSW neighbours -> hits.

Scores are made comparable across terms by normalising each query's cosine similarities
against that query's similarities to a fixed random sample of the archive's windows
(a per-term z-score): short, common-sounding words score high everywhere, and this
removes that offset before any threshold is applied.

When the models have a letter head, a second look re-ranks the candidates: each candidate's
stretch of audio (its window, LETTER_MARGIN either side) is aligned with the term's letters
over the stored letter posteriors (detector/letters.py); each candidate's evidence is the
embedding z-score plus `weight` times the alignment cost per letter, and the hit takes the
aligned times. The weight is fitted on the dev split's broadcasts (exporters/fit_rescoring.py).

Each hit's evidence is then judged against the term's own background: the same evidence
(embedding z-score plus letter alignment) of the term over a fixed random sample of the
archive's stretches (BACKGROUND_STRETCHES of the windows), nearly all of which are not the
term. A hit's features (posterior_features) are its evidence above the background's 99th
percentile and above its median, its evidence below the term's best candidate, and the log of
the term's letter count; a logistic map fitted on the dev broadcasts, with never-spoken terms
among them (exporters/fit_background.py; card key "background"), turns them into the hit's
posterior, and `score` is its log-odds. No feature grows or shrinks with the number of the
term's occurrences: a word spoken 20 times, each as clearly as another word spoken once, gets
the same posterior for each (per-term sum-to-one, Mamou et al., Interspeech 2013, shares one
mass among all of them, which `scoring = "sum-to-one"` still gives for comparison). The term's
expected count is the sum of its candidate pool's posteriors, and the term-specific threshold of
keyword-specific thresholding (Miller et al., Interspeech 2007; calibration.twv_threshold)
is computed from it: `twv_margin` is a hit's log-odds above it.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from . import IndexDamaged, TrawlError
from .graph import query_ef
from .hits import Hit
from .index_store import Index
from .letters import dequantise, keyword_scores, letter_ids, per_letter
from .models import load
from .calibration import twv_threshold
from .spelling import letter_count, readable_term, word_type
from .windows import window_times

BACKGROUND_SAMPLE = 4000
FEEDBACK_HITS = 0  # pseudo-relevance feedback: top hits whose vectors are added to the query (0: off)
FEEDBACK_WEIGHT = 1.0
NORMALISE = True  # score = z-score of the cosine against the archive's windows (else the cosine itself)
LETTER_MARGIN = 0.25  # seconds of audio either side of a candidate window searched by the letter alignment
DEFAULT_LETTER_WEIGHT, DEFAULT_TAU = 1.0, 1.0  # used when the model card records no fitted values
POOL_REGIONS = 200  # candidate stretches per term given the letter pass (the normalisation pool)
POOL_WINDOWS = 1600  # nearest windows fetched, at least, to fill that pool after NMS
BACKGROUND_STRETCHES = 1000  # random archive windows that form each term's background evidence
BACKGROUND_QUANTILE = 0.99  # the background's level a hit is compared with
# the posterior map over posterior_features when the card records none (the fit of the current models)
DEFAULT_BACKGROUND_MAP = ((0.218, 0.7359, 0.5942, 1.2547), -11.1312)
UNCALIBRATED_CENTRE, UNCALIBRATED_SCALE = 7.0, 1.0  # centre: between the MTWV thresholds of the held-out benchmark (6.4 radio, 7.3 clean)


def uncalibrated_confidence(score: np.ndarray, centre: float = UNCALIBRATED_CENTRE,
                             scale: float = UNCALIBRATED_SCALE) -> np.ndarray:
    """A monotone map of score to [0, 1]. Not calibrated: it is no probability until `trawl calibrate`."""
    return 1.0 / (1.0 + np.exp(-(np.asarray(score, np.float64) - centre) / scale))


def posterior_features(evidence, high: float, median: float, best: float, n_letters: float) -> np.ndarray:
    """(n, 4): evidence above the background's high quantile, below the term's best candidate,
    above the background's median, and log(letters): the inputs of the posterior map (see the module text)."""
    e = np.asarray(evidence, np.float64).reshape(-1)
    return np.column_stack([e - high, e - best, e - median, np.full(len(e), np.log(max(n_letters, 1.0)))])


def pool_log_odds(evidence, high: float, median: float, n_letters: int, weights, intercept: float):
    """Log-odds of each candidate of a term's pool (best first or not) and the background tuple used:
    the posterior map over posterior_features, the best candidate taken from the first POOL_REGIONS."""
    e = np.asarray(evidence, np.float64)
    bg = (float(high), float(median), float(e[:POOL_REGIONS].max()), float(n_letters))
    return posterior_features(e, *bg) @ np.asarray(weights, np.float64) + float(intercept), bg


def twv_margin(hit) -> float:
    """A hit's log-odds above its term's TWV threshold (>= 0: keyword-specific thresholding accepts it)."""
    p = min(max(float(hit.confidence), 1e-12), 1 - 1e-12)
    t = min(max(float(hit.extra.get("twv_threshold", 0.5)), 1e-12), 1 - 1e-12)
    return float(np.log(p / (1 - p)) - np.log(t / (1 - t)))


def nms(starts: np.ndarray, ends: np.ndarray, groups: np.ndarray, scores: np.ndarray) -> np.ndarray:
    """Non-maximum suppression in time: indices of the windows kept, best first.

    Windows are taken in order of decreasing score; a window is dropped when it overlaps a
    kept window of the same group (broadcast) at all.
    """
    order = np.argsort(-scores, kind="stable")
    kept: list[int] = []
    taken: dict[int, list[tuple[float, float]]] = {}
    for i in order:
        g = int(groups[i])
        s, e = float(starts[i]), float(ends[i])
        if any(s < ke and ks < e for ks, ke in taken.get(g, ())):
            continue
        kept.append(int(i))
        taken.setdefault(g, []).append((s, e))
    return np.array(kept, dtype=np.int64)


@dataclass
class Ranked:
    """A query's candidate stretches: broadcast index, times, score, cosine, letter-aligned or not;
    `order` ranks them (after NMS); `background` the (median, scale) of the term's background evidence;
    `evidence` what the posterior map reads."""
    bi: np.ndarray
    starts: np.ndarray
    ends: np.ndarray
    score: np.ndarray
    raw: np.ndarray
    aligned: np.ndarray
    order: np.ndarray
    background: tuple
    evidence: np.ndarray | None = None  # before the posterior map (None without the letter pass)


class Searcher:
    def __init__(self, index_dir: Path | str, models_dir: str | None = None, rules=None, adapt: bool = True,
                 use_stored_rules: bool = True, feedback: int = FEEDBACK_HITS, normalise: bool = NORMALISE):
        from .adaptation import QueryMap
        from .calibration import Calibration
        from .rule_learning import LEARNED_RULES_FILE, LearnedRules
        from .rules import parse_rules

        self.feedback, self.normalise = feedback, normalise
        self._spelled: dict = {}
        self._letters: dict = {}
        self.index = Index.open(Path(index_dir))
        self.models = load(models_dir)
        self.index.check_models(self.models)
        self.warnings: list[str] = []  # said once per searcher: damaged broadcasts left out
        with self.index.snapshot():  # the last finished state, even while a run is writing
            self._open_snapshot()
        if self.graph.get_current_count() == 0 or not self.counts.sum():
            if self.warnings:  # everything it holds is in damaged files
                raise IndexDamaged(f"the index at {self.index.root} holds no windows that can be searched: {self.warnings[0]}")
            raise TrawlError(f"the index at {self.index.root} holds no windows yet")
        self.total_seconds = self.index.total_seconds()
        # label -> window: labels of a broadcast are contiguous, so one flat array per field suffices
        self.offsets = np.concatenate([[0], np.cumsum(self.counts)[:-1]]).astype(np.int64)
        self.flat_starts = np.concatenate([st for st, _ in self.spans]) if self.spans else np.zeros(0, np.int32)
        self.flat_kinds = np.concatenate([kd for _, kd in self.spans]) if self.spans else np.zeros(0, np.uint8)
        rules_text = self.index.read_text("rules.txt") if use_stored_rules and rules is None else None
        self.rules = rules if rules is not None else (parse_rules(rules_text, "rules stored in the index") if rules_text else None)
        cal = self.index.read_setting("calibration.json")
        self.calibration = Calibration.from_dict(cal) if cal else None
        qm = self.index.read_setting("query_map.json") if adapt else None
        self.query_map = QueryMap.from_dict(qm) if qm else None
        lr = self.index.read_setting(LEARNED_RULES_FILE) if adapt else None
        learned = LearnedRules.from_dict(lr) if lr else None
        self.learned_rules = learned.ruleset() if learned is not None and learned.enabled else None
        rng = np.random.default_rng(0)
        # drawn over the windows in broadcast-name order, not label order: a broadcast embedded again
        # (repaired, changed) gets new labels, and the sample, hence every score, must not move
        by_name = sorted(range(len(self.names)), key=self.names.__getitem__)
        live = np.concatenate([np.arange(self.firsts[i], self.firsts[i] + self.counts[i]) for i in by_name])
        pick = live if len(live) <= BACKGROUND_SAMPLE else rng.choice(live, BACKGROUND_SAMPLE, replace=False)
        self.background_labels = np.sort(pick)
        self.background = self.index.vectors(self.background_labels)
        self.letter_pass = self.models.has_letters and self.index.manifest.get("letters") == self.models.alphabet
        r = self.models.rescoring
        self.letter_weight = float(r.get("weight", DEFAULT_LETTER_WEIGHT))
        self.tau = float(r.get("tau", DEFAULT_TAU))
        # "background" (the default: count-independent posteriors) or "sum-to-one" (earlier releases, for comparison)
        self.scoring = "background"
        # sum-to-one's confidence: 0.5 at the dev MTWV threshold; search by example: the embedding's
        self.uncalibrated_centre = float(r.get("centre", 0.0)) if self.letter_pass else UNCALIBRATED_CENTRE
        self.uncalibrated_scale = float(r.get("scale", 1.0)) if self.letter_pass else UNCALIBRATED_SCALE
        bgmap = self.models.card.get("background", {}) if self.letter_pass else {}
        self.background_map = (np.asarray(bgmap.get("weights", DEFAULT_BACKGROUND_MAP[0]), np.float64),
                               float(bgmap.get("intercept", DEFAULT_BACKGROUND_MAP[1])))
        self.stretch_labels = np.sort(np.random.default_rng(1).permutation(self.background_labels)[:BACKGROUND_STRETCHES])
        self._background: dict = {}  # (term, use_map) -> (median, scale) of its background evidence
        self._pooled: dict = {}  # (term, use_map) -> Ranked, for re-scoring checked rows

    def _open_snapshot(self) -> None:
        """Catalogue rows, graph, pending vectors and letters, read as one state. A broadcast held by
        a missing or damaged file (sizes against the catalogue's record) is left out, and said once."""
        from .integrity import verify

        rows = self.index.broadcasts()
        damage = verify(self.index, hashes=False, rows=rows)
        bad = {i for d in damage for i in d.ids}
        if damage:
            paths = sorted({p for d in damage for p in d.paths})
            self.warnings.append(
                f"{len(paths)} damaged broadcast(s) left out of this search ({', '.join(paths[:3])}"
                f"{' ...' if len(paths) > 3 else ''}: {damage[0].line()}); run `trawl status --verify --index "
                f"{self.index.root}` for details and `trawl index ARCHIVE_DIR --index {self.index.root}` to repair")
        shards = frozenset(d.shard for d in damage if d.shard is not None)
        # labels of left-out broadcasts are never located: their counts become 0
        self.rows = [dict(b, n_windows=0) if b["id"] in bad else b for b in rows]
        self.graph = self.index.load_graph(skip_shards=shards, rows=[b for b in self.rows if b["n_windows"]])
        self.names, self.firsts, self.counts, self.spans = self.index.window_table(self.rows)
        self.spans = [(st[:n], kd[:n]) for (st, kd), n in zip(self.spans, self.counts)]
        self._letters = {i: self.index.letters(b) for i, b in enumerate(self.rows) if b["n_windows"]}

    # ------------------------------------------------------------ queries
    def spelling_vector(self, term: str, use_map: bool = True) -> tuple[str, str, np.ndarray]:
        from .api import embed_spellings

        key = (term, use_map)
        if key not in self._spelled:  # checked samples and batches repeat terms: embed each once
            t = word_type(term)
            spelled = readable_term(term, set(self.models.symbols))  # other scripts: written in Latin letters
            spelled = self.rules.apply(spelled) if self.rules else spelled
            if self.learned_rules is not None:
                spelled = self.learned_rules.apply_or_keep(spelled)
            v = embed_spellings([spelled])[0]
            if use_map and self.query_map is not None and self.query_map.enabled:
                v = self.query_map.apply(v[None])[0]
            self._spelled[key] = (t, spelled, v)
        return self._spelled[key]

    def overlapping(self, broadcast: str, start: float, end: float) -> tuple[np.ndarray, np.ndarray]:
        """Labels of the stored windows of `broadcast` that overlap (start, end), and their overlap ratios (IoU)."""
        try:
            bi = self.names.index(broadcast)
        except ValueError:
            raise TrawlError(f"{broadcast} is not in the index") from None
        s, e = window_times(*self.spans[bi], self.index.windows)
        inter = np.maximum(0.0, np.minimum(e, end) - np.maximum(s, start))
        over = np.flatnonzero(inter > 0)
        if not len(over):
            raise TrawlError(f"no indexed window of {broadcast} overlaps {start:.2f}-{end:.2f} s")
        iou = inter[over] / (np.maximum(e[over], end) - np.minimum(s[over], start))
        return self.firsts[bi] + over, iou

    def stretch_letters(self, broadcast: str, start: float, end: float) -> np.ndarray | None:
        """Letter log-probs of a stretch of a broadcast (rule_learning.REGION_MARGIN either side)."""
        return self._stretch(self.names.index(broadcast), start, end) if broadcast in self.names else None

    def _stretch(self, b: int, start: float, end: float) -> np.ndarray | None:
        from .rule_learning import stretch

        post = self.broadcast_letters(b)
        if post is None:
            return None
        return dequantise(stretch(post, start, end, float(self.index.manifest["frame_seconds"])))

    def window_letters(self, labels: np.ndarray) -> list[np.ndarray | None]:
        """Letter log-probs over the stretch of each stored window (None without posteriors)."""
        bi, wi = self.locate(np.asarray(labels, np.int64))
        out = []
        for b, w in zip(bi, wi):
            if b < 0:
                out.append(None)
                continue
            s, e = window_times(self.spans[b][0][w : w + 1], self.spans[b][1][w : w + 1], self.index.windows)
            out.append(self._stretch(int(b), float(s[0]), float(e[0])))
        return out

    def window_vector(self, broadcast: str, start: float, end: float) -> np.ndarray:
        """The stored vector of the window that best covers (start, end) in a broadcast."""
        labels, iou = self.overlapping(broadcast, start, end)
        return self.index.vectors([labels[int(np.argmax(iou))]])[0]

    def best_overlapping(self, v: np.ndarray, broadcast: str, start: float, end: float) -> np.ndarray:
        """The stored vector, among windows overlapping (start, end), that is closest to query `v`."""
        labels, _ = self.overlapping(broadcast, start, end)
        vecs = self.index.vectors(labels)
        return vecs[int(np.argmax(vecs @ v))]

    # ------------------------------------------------------------ search
    def locate(self, labels: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Broadcast position and window position of each label; -1 for labels no longer live."""
        bi = np.searchsorted(self.firsts, labels, side="right") - 1
        ok = bi >= 0
        wi = np.where(ok, labels - self.firsts[np.maximum(bi, 0)], -1)
        ok &= wi < self.counts[np.maximum(bi, 0)]
        return np.where(ok, bi, -1), np.where(ok, wi, -1)

    def search_vector(self, term: str, vector: np.ndarray, top: int | None = 10, letters: int | None = None,
                      candidates: int | None = None) -> list[Hit]:
        """Hits for a query vector, best first. With `letters=0` (search by example) the letter pass is skipped."""
        searched = self.spelling_vector(term, use_map=False)[1] if letters is None else ""
        n_letters = letter_count(searched) if letters is None else letters
        r = self.rank(term, vector, top, n_letters, candidates)
        conf, accepted = self.confidence(r.score[r.order], r.raw[r.order], n_letters)
        expected = float(conf.sum())  # the pool's posteriors (calibrated ones, once a calibration exists)
        decision = {"searched": searched, "expected_count": round(expected, 3),
                    "twv_threshold": round(twv_threshold(expected, self.total_seconds), 4)}
        order = r.order[:top] if top else r.order
        return [Hit(term=term, broadcast=self.names[r.bi[i]], start=round(float(r.starts[i]), 3),
                    end=round(float(r.ends[i]), 3), score=float(r.score[i]), confidence=float(conf[k]), rank=k + 1,
                    accepted=None if accepted is None else bool(accepted[k]), raw=float(r.raw[i]), letters=n_letters,
                    aligned=bool(r.aligned[i]), extra=dict(decision))
                for k, i in enumerate(order)]

    def rank(self, term: str, vector: np.ndarray, top: int | None, n_letters: int, candidates: int | None = None) -> Ranked:
        """The candidate stretches of a query, scored, with their ranking after NMS (see the module text)."""
        v = (vector / np.linalg.norm(vector)).astype(np.float32)
        ids = self.letter_targets(term) if (self.letter_pass and n_letters) else []
        n = int(self.counts.sum())  # live windows (the graph may still hold removed ones, never returned)
        k = min(n, candidates or max(POOL_WINDOWS if ids else 300, 40 * (top or 25)))
        self.graph.set_ef(query_ef(k, self.graph.largest_shard()))
        labels, dist = self.graph.knn_query(v[None], k=k, num_threads=1)
        labels, raw = labels[0].astype(np.int64), 1.0 - dist[0]
        bi, wi = self.locate(labels)
        keep = bi >= 0
        raw, bi, wi = raw[keep], bi[keep], wi[keep]
        score = self.score(raw, v)
        pos = self.offsets[bi] + wi
        starts, ends = window_times(self.flat_starts[pos], self.flat_kinds[pos], self.index.windows)
        order = nms(starts, ends, bi, score)
        if not ids:
            return Ranked(bi, starts, ends, score, raw, np.zeros(len(score), bool), order, (0.0, 1.0))
        pool = order[: max(POOL_REGIONS, 2 * (top or 100))]
        cost, a_start, a_end = self.align(ids, bi[pool], starts[pool], ends[pool])
        aligned = cost > -np.inf
        starts, ends = np.where(aligned, a_start, starts[pool]), np.where(aligned, a_end, ends[pool])
        evidence = self.combine(score[pool], cost, len(ids))
        if self.scoring == "sum-to-one":
            bg = (self.normaliser(evidence[:POOL_REGIONS]), 1.0)
            score = evidence - bg[0]
        else:
            high, median = self.term_background(term, v, ids)
            score, bg = pool_log_odds(evidence, high, median, len(ids), *self.background_map)
        return Ranked(bi[pool], starts, ends, score, raw[pool], aligned, nms(starts, ends, bi[pool], score), bg, evidence)

    def term_background(self, term: str, v: np.ndarray, ids: list[int]) -> tuple[float, float]:
        """(99th percentile, median) of the term's evidence over the fixed sample of archive stretches."""
        key = (term, v.tobytes())
        if key not in self._background:
            labels = self.stretch_labels
            bi, wi = self.locate(labels)
            ok = bi >= 0
            bi, wi = bi[ok], wi[ok]
            pos = self.offsets[bi] + wi
            starts, ends = window_times(self.flat_starts[pos], self.flat_kinds[pos], self.index.windows)
            z = self.score(self.index.vectors(labels[ok]) @ v, v)
            ev = self.combine(z, self.align(ids, bi, starts, ends, with_times=False)[0], len(ids))
            self._background[key] = (float(np.quantile(ev, BACKGROUND_QUANTILE)), float(np.median(ev)))
        return self._background[key]

    def log_odds(self, evidence: np.ndarray, background: tuple) -> np.ndarray:
        """A hit's log-odds of being right: the dev-fitted logistic map of its posterior_features."""
        weights, intercept = self.background_map
        return posterior_features(evidence, *background) @ weights + intercept

    # ------------------------------------------------------------ letter pass
    def letter_targets(self, term: str) -> list[int]:
        """Letter classes of the term as spelled for the model (after the spelling rules)."""
        return letter_ids(self.spelling_vector(term, use_map=False)[1], self.models.letter_table)

    def broadcast_letters(self, b: int):
        return self._letters.get(b)

    def align(self, ids: list[int], bi: np.ndarray, starts: np.ndarray, ends: np.ndarray, with_times: bool = True):
        """Alignment cost (<= 0, -inf where none fits) and aligned times of each candidate stretch
        (with `with_times=False` only the cost is found, faster; the times stay the stretches')."""
        fs = float(self.index.manifest["frame_seconds"])
        regions, offsets, where = [], [], []
        for i, (b, s0, e0) in enumerate(zip(bi, starts, ends)):
            post = self.broadcast_letters(int(b))
            if post is None:
                continue
            lo = max(0, int(np.floor((s0 - LETTER_MARGIN) / fs)))
            hi = min(len(post), int(np.ceil((e0 + LETTER_MARGIN) / fs)))
            if hi - lo >= len(ids):
                regions.append(dequantise(np.asarray(post[lo:hi])))
                offsets.append(lo)
                where.append(i)
        cost = np.full(len(bi), -np.inf)
        a_start, a_end = np.asarray(starts, np.float64).copy(), np.asarray(ends, np.float64).copy()
        if regions:
            c, first, last = keyword_scores(regions, ids, with_times)
            w = np.array(where)
            good = first >= 0 if with_times else c > -np.inf
            off = np.array(offsets)
            cost[w[good]] = c[good]
            if with_times:
                a_start[w[good]] = (off[good] + first[good]) * fs
                a_end[w[good]] = (off[good] + last[good] + 1) * fs
        return cost, a_start, a_end

    def combine(self, z: np.ndarray, cost: np.ndarray, n_letters: int) -> np.ndarray:
        """A candidate's evidence: embedding z-score plus weight x alignment cost per letter (floored)."""
        return np.asarray(z, np.float64) + self.letter_weight * per_letter(cost, n_letters)

    def normaliser(self, pool_evidence: np.ndarray) -> float:
        """tau * log sum exp(evidence / tau) over a query's candidate pool (sum-to-one in the log domain)."""
        from scipy.special import logsumexp

        if not len(pool_evidence):
            return 0.0
        return self.tau * float(logsumexp(np.asarray(pool_evidence, np.float64) / self.tau))

    def confidence(self, score, raw, letters):
        if self.calibration is None:
            if letters and self.letter_pass and self.scoring == "background":  # score is a log-odds
                return uncalibrated_confidence(score, 0.0, 1.0), None
            centre = self.uncalibrated_centre if letters and self.letter_pass else UNCALIBRATED_CENTRE
            return uncalibrated_confidence(score, centre, self.uncalibrated_scale if letters else UNCALIBRATED_SCALE), None
        from .calibration import hit_features

        X = hit_features(np.asarray(score), np.asarray(raw), np.full(len(score), letters))
        conf = self.calibration.confidence(X)
        return conf, conf >= self.calibration.threshold

    def query(self, term: str, examples: list[np.ndarray] | None = None, use_map: bool = True) -> tuple[str, np.ndarray]:
        """The normalised term and its query vector: the spelling's, averaged with any examples."""
        t, _, v = self.spelling_vector(term, use_map=use_map)
        if examples:
            v = np.mean([v] + [e / np.linalg.norm(e) for e in examples], axis=0)
        v = v / np.linalg.norm(v)
        return t, self.expand(v) if self.feedback else v

    def expand(self, v: np.ndarray) -> np.ndarray:
        """Pseudo-relevance feedback: add the mean vector of the query's best distinct windows."""
        labels, _ = self.graph.knn_query(v[None].astype(np.float32), k=min(self.graph.get_current_count(), 60), num_threads=1)
        labels = labels[0].astype(np.int64)
        bi, wi = self.locate(labels)
        ok = bi >= 0
        labels, bi, wi = labels[ok], bi[ok], wi[ok]
        pos = self.offsets[bi] + wi
        starts, ends = window_times(self.flat_starts[pos], self.flat_kinds[pos], self.index.windows)
        vecs = self.index.vectors(labels)
        keep = nms(starts, ends, bi, vecs @ v)[: self.feedback]
        fb = vecs[keep].mean(axis=0)
        out = v + FEEDBACK_WEIGHT * fb / np.linalg.norm(fb)
        return out / np.linalg.norm(out)

    def search(self, term: str, top: int | None = 10, examples: list[np.ndarray] | None = None,
               use_map: bool = True) -> list[Hit]:
        t, v = self.query(term, examples, use_map)
        return self.search_vector(t, v, top=top)

    def rescore(self, term: str, broadcast: str, start: float, end: float, use_map: bool = True) -> tuple[float, float]:
        """(score, raw) of `term` at (start, end) in `broadcast`, as search scores it.

        A stretch that search lists as a hit (overlap >= 0.3 of the union) takes that hit's score;
        any other stretch is scored from the best window overlapping it, aligned over its own span."""
        t, v = self.query(term, use_map=use_map)
        ids = self.letter_targets(t) if self.letter_pass else []
        if ids:
            key = (t, use_map)
            if key not in self._pooled:  # the term's whole candidate pool, scored as search scores it
                self._pooled[key] = self.rank(t, v, None, len(ids))
            r = self._pooled[key]
            same = np.array([self.names[b] == broadcast for b in r.bi], bool)
            inter = np.minimum(r.ends, end) - np.maximum(r.starts, start)
            iou = np.where(same & (inter > 0), inter / (np.maximum(r.ends, end) - np.minimum(r.starts, start)), 0.0)
            best = int(np.argmax(iou)) if len(iou) else -1
            if best >= 0 and iou[best] >= 0.3:  # a stretch search lists: its own score
                return float(r.score[best]), float(r.raw[best])
        raw = float(self.best_overlapping(v, broadcast, start, end) @ v)
        z = float(self.score(np.float64(raw), v))
        if ids:
            cost = self.align(ids, np.array([self.names.index(broadcast)]), np.array([start]), np.array([end]))[0]
            ev = self.combine(np.array([z]), cost, len(ids))
            z = float(ev[0] - r.background[0] if self.scoring == "sum-to-one" else self.log_odds(ev, r.background)[0])
        return z, raw

    def score(self, raw: np.ndarray, v: np.ndarray) -> np.ndarray:
        """Ranking score of cosines `raw` for query `v`: a z-score against the archive's windows (or raw)."""
        if not self.normalise:
            return raw
        bg = self.background @ v
        return (raw - float(bg.mean())) / float(bg.std() + 1e-6)
