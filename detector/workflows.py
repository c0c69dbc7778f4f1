"""What the archivist does with a checked sample: calibrate confidences, adapt the query side.

Both re-score each checked row from the index (the best window for that term overlapping the
row's span), so they need the index, not the audio or the old scores. Neither ever changes
the index's vectors: they write small, versioned JSON files beside them.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import date
from pathlib import Path

import numpy as np

from . import TrawlError
from .calibration import Calibration, best_first_depth, best_first_sample, fit_calibration, hit_features, reliability_svg, suggest_sample
from .checked import read_checked, sample_hash
from .hits import Hit
from .index_store import Index
from .letters import dequantise, quantise
from .search import Searcher
from .spelling import letter_count, word_type

CALIBRATION_FILE = "calibration.json"
QUERY_MAP_FILE = "query_map.json"
MAP_MIN_GAIN = 0.01  # held-out MAP gain the query map must show: smaller gains are noise over a few dozen terms
MAP_SIGNIFICANCE = 0.05  # ... and that gain must pass a one-sided paired t-test over the held-out terms at this level
RULE_BACKGROUND = 400  # archive windows the learned rules are contrasted with
MAX_ALIGNED_WORDS = 3000  # aligned-corpus words used at most (the rest would add time, not evidence)
ARCHIVE_FRAMES = 360_000  # 2 hours of 20 ms frames decoded for the foreign-spelling test


@dataclass
class Scored:
    terms: list[str]
    X: np.ndarray  # hit features
    y: np.ndarray  # 1 correct, 0 wrong
    rows: list


def score_checked(searcher: Searcher, path: Path, use_map: bool = True) -> Scored:
    rows = [r for r in read_checked(path) if r.verdict is not None]
    if not rows:
        raise TrawlError(f"{path}: no row has a verdict (fill the verdict column with yes or no)")
    scores, raws, letters, terms = [], [], [], []
    for r in rows:
        try:
            s, raw = searcher.rescore(r.term, r.broadcast, r.start, r.end, use_map=use_map)
        except TrawlError as e:
            raise TrawlError(f"{path}, line {r.line}: {e}") from None
        scores.append(s)
        raws.append(raw)
        letters.append(letter_count(r.term))
        terms.append(word_type(r.term))
    X = hit_features(np.array(scores), np.array(raws), np.array(letters))
    return Scored(terms, X, np.array([1 if r.verdict else 0 for r in rows]), rows)


def calibrate(index_dir: Path, checked: Path, target_precision: float = 0.9, diagram: Path | None = None,
              models_dir: str | None = None) -> tuple[Calibration, Path]:
    """Fit and store a calibration from a checked sample; write the reliability diagram.
    A refused sample leaves every index file as it was."""
    with Index.open(index_dir).settings_change():
        return _calibrate(index_dir, checked, target_precision, diagram, models_dir)


def _calibrate(index_dir: Path, checked: Path, target_precision: float, diagram: Path | None,
               models_dir: str | None) -> tuple[Calibration, Path]:
    searcher = Searcher(index_dir, models_dir)
    sc = score_checked(searcher, Path(checked))
    cal = fit_calibration(sc.X, sc.y, sc.terms, target_precision=target_precision,
                          total_seconds=searcher.total_seconds, sample_hash=sample_hash(checked))
    cal.created = cal.created or date.today().isoformat()
    cal.report["checked_sample"] = str(checked)
    diagram = Path(diagram) if diagram else Path(checked).with_suffix(".reliability.svg")
    oof = np.asarray(cal.report.get("out_of_fold", []), dtype=float)
    probs = oof if len(oof) == len(sc.y) else cal.confidence(sc.X)
    reliability_svg(probs, sc.y, diagram, title=f"Reliability, {len(sc.y)} checked hits (held-out folds)")
    searcher.index.write_setting(CALIBRATION_FILE, cal.to_dict())
    return cal, diagram


def _suggest_searcher(index_dir: Path, terms: list[str], n: int, models_dir: str | None) -> Searcher:
    """The searcher a --suggest run draws from, once its arguments are checked."""
    if n <= 0:
        raise TrawlError("--suggest needs a positive number of hits")
    if not terms:
        raise TrawlError("--suggest needs terms to search for (--terms FILE)")
    return Searcher(index_dir, models_dir)


def suggest(index_dir: Path, terms: list[str], n: int, per_term: int = 60, models_dir: str | None = None,
            seed: int = 0) -> list[Hit]:
    """N hits to check, spread over the given terms and their score ranges."""
    searcher = _suggest_searcher(index_dir, terms, n, models_dir)
    pool = [h for t in terms for h in searcher.search(t, top=per_term)]
    return suggest_sample(pool, n, seed=seed)


def suggest_for_adaptation(index_dir: Path, terms: list[str], n: int, models_dir: str | None = None) -> list[Hit]:
    """N hits to check for `trawl adapt`: each term's two best hits, then each term's next two, ... (best_first_sample)."""
    searcher = _suggest_searcher(index_dir, terms, n, models_dir)
    depth = best_first_depth(n, len(terms))
    return best_first_sample([searcher.search(t, top=depth) for t in terms], n)


def archive_letters(searcher: Searcher, frame_budget: int = ARCHIVE_FRAMES) -> str:
    """What the model hears in the archive: greedy letter decoding of broadcasts in a fixed
    random order, up to `frame_budget` frames in all (for the learned rules' foreign-spelling test)."""
    from .rule_learning import heard_letters

    out, used = [], 0
    for b in np.random.default_rng(0).permutation(len(searcher.names)):  # spread over the archive when cut short
        post = searcher.broadcast_letters(int(b))
        if post is None:
            continue
        take = np.asarray(post[: max(0, frame_budget - used)])
        out.append(heard_letters(dequantise(take), searcher.models.alphabet))
        used += len(take)
        if used >= frame_budget:
            break
    return " ".join(out)


def background_rows(labels: np.ndarray, checked_labels: np.ndarray, n: int = RULE_BACKGROUND) -> np.ndarray:
    """Positions in `labels` (the search's background windows) of at most n windows, spread evenly,
    that are not windows of a checked hit: in a small archive the random background can hold a
    checked hit's own windows, and a confirmed hit must not count against its own term."""
    free = np.flatnonzero(~np.isin(labels, checked_labels))
    return free[:: max(1, len(free) // n)][:n]


def aligned_examples(searcher: Searcher, corpus: Path, max_words: int = MAX_ALIGNED_WORDS):
    """Spellings (after the archivist's rules), span vectors and letter stretches of the aligned
    words of a corpus in the shared layout, up to `max_words` words."""
    from . import audio
    from .aligned import read_aligned
    from .api import embed_spans, letter_posteriors
    from .features import SAMPLE_RATE
    from .rule_learning import stretch

    spelled, vectors, regions = [], [], []
    fs = float(searcher.index.manifest["frame_seconds"])
    for rec in read_aligned(corpus):
        if len(spelled) >= max_words:
            break
        try:
            x = audio.load(rec.audio)
        except TrawlError as e:
            raise TrawlError(f"aligned corpus: {e}") from None
        words = [(s, min(e, len(x) / SAMPLE_RATE), w) for s, e, w in rec.words if e - s >= 0.06 and s < len(x) / SAMPLE_RATE - 0.06]
        if not words:
            continue
        vectors.append(embed_spans(x, SAMPLE_RATE, [(s, e) for s, e, _ in words], searcher.models.dir))
        logp = dequantise(quantise(letter_posteriors(x, SAMPLE_RATE, searcher.models.dir)))  # as the index stores them
        for s, e, w in words:
            spelled.append(searcher.spelling_vector(w, use_map=False)[1])
            regions.append(stretch(logp, s, e, fs))
    n = min(len(spelled), max_words)
    return spelled[:n], (np.concatenate(vectors)[:n] if vectors else np.zeros((0, searcher.models.dim), np.float32)), regions[:n]


def adapt(index_dir: Path, checked: Path, models_dir: str | None = None, aligned: Path | None = None) -> dict:
    """Learn the query side from a checked sample (and optionally an aligned corpus): respelling
    rules, then a map after the spelling encoder; store each (versioned) and switch on those
    that help held-out terms. All or nothing: a refused sample leaves every index file as it was."""
    with Index.open(index_dir).settings_change():
        return _adapt(index_dir, checked, models_dir, aligned)


def _adapt(index_dir: Path, checked: Path, models_dir: str | None, aligned: Path | None) -> dict:
    from .adaptation import fit_query_map
    from .api import embed_spellings
    from .rule_learning import LEARNED_RULES_FILE, Evidence, fit_learned_rules

    searcher = Searcher(index_dir, models_dir, adapt=False)
    rows = [r for r in read_checked(Path(checked)) if r.verdict is not None]
    if not rows:
        raise TrawlError(f"{checked}: no row has a verdict (fill the verdict column with yes or no)")
    spelled, base, y, regions, checked_labels = [], [], [], [], []
    for r in rows:
        try:
            checked_labels.append(searcher.overlapping(r.broadcast, r.start, r.end)[0])
        except TrawlError as e:
            raise TrawlError(f"{checked}, line {r.line}: {e}") from None
        _, sp, v = searcher.spelling_vector(r.term, use_map=False)
        spelled.append(sp)
        base.append(v)
        y.append(1 if r.verdict else 0)
        regions.append(searcher.stretch_letters(r.broadcast, r.start, r.end))
    n_checked = len(rows)
    extra_spelled, extra_vectors, extra_regions = (aligned_examples(searcher, Path(aligned)) if aligned
                                                   else ([], np.zeros((0, searcher.models.dim), np.float32), []))
    if extra_spelled:  # already respelled by the archivist's rules: embed as they are, once per spelling
        vector_of = dict(zip(sorted(set(extra_spelled)), embed_spellings(sorted(set(extra_spelled)), models_dir)))
        base += [vector_of[w] for w in extra_spelled]
    spelled += extra_spelled
    y += [1] * len(extra_spelled)
    regions += extra_regions

    def hit_vectors(queries: np.ndarray) -> np.ndarray:
        """Per example: the indexed window closest to its query (checked rows), its span vector (aligned words)."""
        own = [searcher.best_overlapping(v, r.broadcast, r.start, r.end) for v, r in zip(queries, rows)]
        return np.concatenate([np.array(own, np.float32).reshape(-1, searcher.models.dim), extra_vectors])

    report: dict = {"checked_hits": n_checked, "aligned_words": len(extra_spelled)}
    respell = {w: w for w in set(spelled)}
    rows_bg = background_rows(searcher.background_labels, np.concatenate(checked_labels))
    bg, bg_vectors = searcher.background_labels[rows_bg], searcher.background[rows_bg]
    if searcher.letter_pass and all(g is not None for g in regions) and any(y):
        bg_regions = searcher.window_letters(bg)
        keep = [i for i, g in enumerate(bg_regions) if g is not None and len(g)]
        ev = Evidence(spelled, hit_vectors(np.array(base)), regions, np.array(y, bool),
                      bg_vectors[keep], [bg_regions[i] for i in keep], archive_letters(searcher),
                      searcher.models.letter_table, searcher.models.alphabet,
                      lambda ws: embed_spellings(ws, models_dir), searcher.models.marks, searcher.total_seconds)
        learned = fit_learned_rules(ev)
        learned.sample_hash = sample_hash(checked)
        searcher.index.write_setting(LEARNED_RULES_FILE, learned.to_dict())
        report["rules"] = {**learned.report, "learned": learned.rules_text.splitlines()}
        if learned.enabled:
            rs = learned.ruleset()
            respell = {w: rs.apply_or_keep(w) for w in respell}
    else:
        searcher.index.write_setting(LEARNED_RULES_FILE, None)
        report["rules"] = {"enabled": False, "learned": [],
                           "reason": "the index has no letter posteriors" if not searcher.letter_pass
                           else "the checked sample has no confirmed hit"}
    if any(respell[w] != w for w in respell):
        vector_of = dict(zip(sorted(respell), embed_spellings([respell[w] for w in sorted(respell)], models_dir)))
        q = np.array([vector_of[w] for w in spelled])
    else:
        q = np.array(base)
    qmap, map_report = fit_query_map(q, hit_vectors(q), y, spelled, background=bg_vectors, min_gain=MAP_MIN_GAIN,
                                     significance=MAP_SIGNIFICANCE,
                                     total_seconds=searcher.total_seconds)
    qmap.sample_hash = sample_hash(checked)
    searcher.index.write_setting(QUERY_MAP_FILE, qmap.to_dict())
    report.update(map_report)
    report["stored"] = True
    stored = searcher.index.read_setting(CALIBRATION_FILE)
    if stored is not None and (qmap.enabled or report["rules"].get("enabled")):  # the confidence map follows
        old = Calibration.from_dict(stored)
        sample = Path(old.report.get("checked_sample", checked))
        calibrate(index_dir, sample if sample.exists() else Path(checked), old.target_precision, models_dir=models_dir)
        report["recalibrated"] = True
    return report
