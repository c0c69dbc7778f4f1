"""Search benchmark on held-out broadcasts, clean and radio-like, plus an HNSW scale test.

For each condition: index the broadcasts (timed, from decoding to the index on disk), measure
the index folder's size, search every term and score the hits by term-weighted value (NIST
2006 STD, beta = 999.9), P@10, recall@100 and query time. Then a random index of
`--hours-random` hours' worth of windows (at the measured windows per audio hour) checks
build time, query time and recall of the graph at the settings search uses.

    python tests/benchmarks/bench_search.py [--quick] [--hours-random H] [--work DIR]

Prints a table and a final JSON line (also written to runs/bench_search.json); the hits of
the radio condition, with their verdicts, go to runs/bench_search_hits.json for
bench_calibration.py.
"""

from __future__ import annotations

import argparse
import json
import math
import shutil
import statistics
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from exporters import broadcasts as heldout  # noqa: E402
from detector.evaluate_run import CANDIDATES_PER_TERM, evaluate_hits  # noqa: E402
from detector.evaluation import match_hits, read_reference  # noqa: E402
from detector.graph import SHARD_CAPACITY, ShardedGraph, query_ef  # noqa: E402
from detector.index_store import HNSW_EF_CONSTRUCTION, HNSW_M  # noqa: E402
from detector import audio  # noqa: E402
from detector.features import SAMPLE_RATE  # noqa: E402
from detector.indexing import embed_broadcast, find_audio, index_archive  # noqa: E402
from detector.models import load  # noqa: E402
from detector.search import POOL_WINDOWS, Searcher, twv_margin  # noqa: E402

CONDITIONS = ("clean", "radio")
RANDOM_QUERIES = 200
CHUNK = 100_000  # random vectors generated (and regenerated for exact search) per block


def search_settings(top: int, n: int, letters: bool = True) -> tuple[int, int]:
    """(candidates k, ef) for `Searcher.search(term, top=top)` on n windows: mirrors Searcher.rank."""
    k = min(n, max(POOL_WINDOWS if letters else 300, 40 * top))
    return k, query_ef(k, min(n, SHARD_CAPACITY))


# ------------------------------------------------------------------ broadcasts


def broadcasts(work: Path, corpus: Path, minutes_total, seed: int, broadcast_minutes: float, opus: bool) -> dict:
    """Build the broadcasts under work/broadcasts, or reuse them when built with the same settings."""
    out = work / "broadcasts"
    want = {"corpus": str(corpus.resolve()), "minutes_total": minutes_total, "seed": seed,
            "broadcast_minutes": broadcast_minutes, "opus": opus}
    man = out / "manifest.json"
    if man.exists():
        have = json.loads(man.read_text(encoding="utf-8"))
        if all(have.get(k) == v for k, v in want.items()):
            return have
        shutil.rmtree(out)
    return heldout.build(out, corpus, minutes_total, seed, broadcast_minutes, opus)


def pick_terms(rows, n: int | None, seed: int):
    """All terms, or n of them (seeded), alternating unseen and seen while both last."""
    if n is None or n >= len(rows):
        return rows
    rng = np.random.default_rng(seed)
    pools = [[r for r in rows if r[1] == s] for s in ("unseen", "seen")]
    pools = [[p[i] for i in rng.permutation(len(p))] for p in pools]
    out = []
    while len(out) < n:
        for p in pools:
            if p and len(out) < n:
                out.append(p.pop())
    return out


# ------------------------------------------------------------------ one condition


def folder_bytes(path: Path) -> int:
    return sum(p.stat().st_size for p in path.rglob("*") if p.is_file())


def warm_up(models, audio_dir: Path, seconds: float = 20.0) -> None:
    """Run the indexing pipeline once on a short piece, so the first timed condition pays no start-up costs."""
    x = audio.load(find_audio(audio_dir)[0])
    embed_broadcast(models, x[: int(seconds * SAMPLE_RATE)])


def index_condition(audio_dir: Path, index_dir: Path) -> dict:
    if index_dir.exists():
        shutil.rmtree(index_dir)
    t0 = time.perf_counter()
    rep = index_archive(audio_dir, index_dir)
    wall = time.perf_counter() - t0
    hours = rep.audio_seconds / 3600
    size = folder_bytes(index_dir)
    return {"audio_seconds": rep.audio_seconds, "speech_seconds": rep.speech_seconds, "windows": rep.windows,
            "index_seconds": wall, "x_real_time": rep.audio_seconds / wall, "seconds_per_audio_hour": wall / hours,
            "index_bytes": size, "mb_per_audio_hour": size / 1e6 / hours, "windows_per_audio_hour": rep.windows / hours}


def timed_search(searcher: Searcher, terms: list[str], top: int) -> tuple[list, list[float]]:
    hits, ms = [], []
    for t in terms:
        t0 = time.perf_counter()
        hits += searcher.search(t, top=top)
        ms.append((time.perf_counter() - t0) * 1000)
    return hits, ms


def search_condition(index_dir: Path, reference, term_rows) -> tuple[dict, list]:
    s = Searcher(index_dir)
    terms = [t for t, _, _ in term_rows]
    hits, ms = timed_search(s, terms, CANDIDATES_PER_TERM)
    _, ms10 = timed_search(s, terms, 10)
    total = s.total_seconds
    # ranked by the margin over each term's TWV threshold; ATWV at margin 0 (keyword-specific thresholding)
    res = evaluate_hits(hits, reference, terms, total, 0.0, key=twv_margin)
    out = {k: res[k] for k in ("mtwv", "mtwv_threshold", "atwv", "threshold", "p_at_10", "recall_at_100", "occurrences")}
    out["mtwv_by_score"] = evaluate_hits(hits, reference, terms, total, 0.0, key="score")["mtwv"]
    for split in ("seen", "unseen"):
        part = [t for t, sp, _ in term_rows if sp == split]
        out[f"terms_{split}"] = len(part)
        out[f"mtwv_{split}"] = evaluate_hits(hits, reference, part, total, 0.0, key=twv_margin)["mtwv"] if part else None
    out.update(terms=len(terms), searched_seconds=total, windows_in_graph=s.graph.get_current_count(),
               query_ms_median=statistics.median(ms), query_ms_median_top10=statistics.median(ms10),
               candidates_per_term=CANDIDATES_PER_TERM)
    return out, hits


def hit_records(hits, reference) -> list[dict]:
    correct = match_hits(hits, reference)
    return [{"term": h.term, "broadcast": h.broadcast, "start": h.start, "end": h.end, "score": h.score,
             "raw": h.raw, "letters": h.letters, "confidence": h.confidence, "rank": h.rank, "correct": ok}
            for h, ok in zip(hits, correct)]


# ------------------------------------------------------------------ random-index scale test


def random_block(dim: int, seed: int, block: int, n: int) -> np.ndarray:
    """Block `block` of n random unit vectors; the same arguments give the same vectors."""
    rng = np.random.default_rng([seed, block])
    x = rng.standard_normal((n, dim), dtype=np.float32)
    return x / np.linalg.norm(x, axis=1, keepdims=True)


def exact_top(queries: np.ndarray, dim: int, count: int, seed: int, k: int = 100) -> np.ndarray:
    """Labels of the k largest inner products per query, by brute force over regenerated blocks."""
    best_s = np.full((len(queries), 0), -np.inf, np.float32)
    best_l = np.zeros((len(queries), 0), np.int64)
    for b, lo in enumerate(range(0, count, CHUNK)):
        n = min(CHUNK, count - lo)
        s = np.concatenate([best_s, queries @ random_block(dim, seed, b, n).T], axis=1)
        l = np.concatenate([best_l, np.broadcast_to(np.arange(lo, lo + n), (len(queries), n))], axis=1)
        keep = np.argpartition(-s, min(k, s.shape[1] - 1), axis=1)[:, :k]
        best_s, best_l = np.take_along_axis(s, keep, 1), np.take_along_axis(l, keep, 1)
    return best_l


def random_index_test(dim: int, count: int, seed: int = 11) -> dict:
    g = ShardedGraph(dim, HNSW_M, HNSW_EF_CONSTRUCTION)  # the index's own graph class: shards, parallel queries
    t0 = time.perf_counter()
    for b, lo in enumerate(range(0, count, CHUNK)):
        n = min(CHUNK, count - lo)
        g.add_items(random_block(dim, seed, b, n), np.arange(lo, lo + n), num_threads=2)
    build = time.perf_counter() - t0
    queries = random_block(dim, seed + 1, 0, RANDOM_QUERIES)
    truth = exact_top(queries, dim, count, seed)
    out = {"vectors": count, "dim": dim, "M": HNSW_M, "ef_construction": HNSW_EF_CONSTRUCTION,
           "shards": len(g.shards), "shard_capacity": g.capacity,
           "build_seconds": build, "queries": RANDOM_QUERIES}
    for top in (10, CANDIDATES_PER_TERM):
        k, ef = search_settings(top, count)
        g.set_ef(ef)
        ms100, ms_k, recall = [], [], []
        for q, t in zip(queries, truth):
            t0 = time.perf_counter()
            labels, _ = g.knn_query(q[None], k=100, num_threads=1)
            ms100.append((time.perf_counter() - t0) * 1000)
            recall.append(len(set(labels[0].tolist()) & set(t.tolist())) / 100)
            t0 = time.perf_counter()
            g.knn_query(q[None], k=k, num_threads=1)
            ms_k.append((time.perf_counter() - t0) * 1000)
        out[f"top{top}"] = {"ef": ef, "k": k, "query_ms_k100": statistics.median(ms100),
                            "recall_at_100": float(np.mean(recall)), "query_ms_search_k": statistics.median(ms_k)}
    return out


def real_query_recall(index_dir: Path, terms: list[str], n: int = RANDOM_QUERIES) -> dict:
    """HNSW recall@100 of real term queries on a real index, against exact numpy search over all its vectors."""
    s = Searcher(index_dir)
    g = s.graph
    labels = np.concatenate([np.arange(f, f + c) for f, c in zip(s.firsts, s.counts)])
    vecs = s.index.vectors(labels)
    queries = np.array([s.query(t)[1] for t in terms[:n]], np.float32)
    k, ef = search_settings(10, len(labels))
    g.set_ef(ef)
    found, _ = g.knn_query(queries, k=100, num_threads=1)
    exact = labels[np.argsort(-(queries @ vecs.T), axis=1)[:, :100]]
    recall = np.mean([len(set(a.tolist()) & set(b.tolist())) / 100 for a, b in zip(found, exact)])
    return {"queries": len(queries), "vectors": len(labels), "ef": ef, "recall_at_100": float(recall)}


# ------------------------------------------------------------------ report


def jsonable(v):
    """Non-finite floats (an MTWV threshold of +inf: nothing accepted) as null."""
    if isinstance(v, dict):
        return {k: jsonable(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [jsonable(x) for x in v]
    if isinstance(v, float) and not math.isfinite(v):
        return None
    return v


def fmt(v, spec=".3f"):
    return "-" if v is None else format(v, spec)


def print_table(res: dict) -> None:
    cols = [("x real time", "x_real_time", ".1f"), ("s/audio h", "seconds_per_audio_hour", ".1f"),
            ("MB/h", "mb_per_audio_hour", ".1f"), ("windows/h", "windows_per_audio_hour", ".0f"),
            ("MTWV", "mtwv", ".3f"), ("seen", "mtwv_seen", ".3f"), ("unseen", "mtwv_unseen", ".3f"),
            ("ATWV", "atwv", ".3f"), ("P@10", "p_at_10", ".3f"), ("R@100", "recall_at_100", ".3f"),
            ("ms/query", "query_ms_median", ".1f"), ("ms top10", "query_ms_median_top10", ".1f")]
    print("condition " + " ".join(f"{c:>11}" for c, _, _ in cols))
    for cond in CONDITIONS:
        row = {**res["conditions"][cond]["index"], **res["conditions"][cond]["search"]}
        print(f"{cond:<9} " + " ".join(f"{fmt(row[k], s):>11}" for _, k, s in cols))
    c0 = res["conditions"][CONDITIONS[0]]["search"]
    print(f"terms: {c0['terms']} ({c0['terms_seen']} seen, {c0['terms_unseen']} unseen), {c0['occurrences']} occurrences "
          f"in {c0['searched_seconds'] / 60:.1f} min; ATWV at score >= {c0['threshold']}")
    q = res["real_queries"]
    print(f"real queries ({q['queries']} term spellings) on the radio index ({q['vectors']} vectors): recall@100 against "
          f"exact search {q['recall_at_100']:.3f} at the search's ef {q['ef']}")
    if "random_index" not in res:
        return
    r = res["random_index"]
    print(f"random index: {r['vectors']} vectors ({r['hours']:g} h at {r['windows_per_audio_hour']:.0f} windows/h), "
          f"dim {r['dim']}, M {r['M']}, ef_construction {r['ef_construction']}, {r.get('shards', 1)} shard(s): "
          f"built in {r['build_seconds']:.1f} s")
    for top in (10, CANDIDATES_PER_TERM):
        t = r[f"top{top}"]
        print(f"  as search(top={top}): ef {t['ef']}: k=100 {t['query_ms_k100']:.2f} ms, recall@100 {t['recall_at_100']:.3f}; "
              f"k={t['k']} {t['query_ms_search_k']:.2f} ms (median of {r['queries']} queries)")


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--quick", action="store_true", help="1 broadcast of ~2 min, 5 terms, a 1-hour random index")
    ap.add_argument("--work", type=Path, default=None, help="default runs/bench_search (runs/bench_search_quick with --quick)")
    ap.add_argument("--corpus", type=Path, default=heldout.DEFAULT_CORPUS)
    ap.add_argument("--minutes-total", type=float, default=None, help="minutes of held-out speech (default all)")
    ap.add_argument("--max-terms", type=int, default=None, help="search only this many terms (default all)")
    ap.add_argument("--hours-random", type=float, default=None, help="size of the random index (default 100, quick 1; 0 skips it)")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--no-opus", action="store_true")
    a = ap.parse_args(argv)
    if a.quick:
        minutes, bmin, max_terms = a.minutes_total or 2.0, 2.0, a.max_terms or 5
        hours = 1.0 if a.hours_random is None else a.hours_random
    else:
        minutes, bmin, max_terms, hours = a.minutes_total, 5.0, a.max_terms, 100.0 if a.hours_random is None else a.hours_random
    work = a.work or ROOT / "runs" / ("bench_search_quick" if a.quick else "bench_search")
    work.mkdir(parents=True, exist_ok=True)

    man = broadcasts(work, a.corpus, minutes, a.seed, bmin, not a.no_opus)
    bdir = work / "broadcasts"
    reference = read_reference(bdir / "reference.tsv")
    term_rows = pick_terms(heldout.read_terms(bdir / "terms.tsv"), max_terms, a.seed)
    models = load(None)  # loaded once, outside the timed indexing
    warm_up(models, bdir / "clean")
    res = {"quick": a.quick, "seed": a.seed, "model": models.card.get("name"), "model_card_sha256": models.card_hash,
           "broadcasts": len(man["broadcasts"]), "opus": man["opus"], "conditions": {}}
    for cond in CONDITIONS:
        print(f"indexing and searching {cond} ...", file=sys.stderr, flush=True)
        idx = index_condition(bdir / cond, work / f"index_{cond}")
        search, hits = search_condition(work / f"index_{cond}", reference, term_rows)
        res["conditions"][cond] = {"index": idx, "search": search}
        if cond == "radio":
            (ROOT / "runs").mkdir(exist_ok=True)
            keep = {"condition": cond, "total_seconds": search["searched_seconds"],
                    "terms": [{"term": t, "split": sp, "occurrences": n} for t, sp, n in term_rows],
                    "hits": hit_records(hits, reference)}
            (ROOT / "runs" / "bench_search_hits.json").write_text(json.dumps(keep, ensure_ascii=False), encoding="utf-8")

    res["real_queries"] = real_query_recall(work / "index_radio", [t for t, _, _ in term_rows])
    per_hour = res["conditions"]["radio"]["index"]["windows_per_audio_hour"]
    count = int(round(hours * per_hour))
    if count:
        print(f"random index of {count} vectors ...", file=sys.stderr, flush=True)
        res["random_index"] = {"hours": hours, "windows_per_audio_hour": per_hour, **random_index_test(models.dim, count)}
    print_table(res)
    line = json.dumps(jsonable(res), ensure_ascii=False)
    (ROOT / "runs" / "bench_search.json").write_text(line + "\n", encoding="utf-8")
    print(line)


if __name__ == "__main__":
    main()
