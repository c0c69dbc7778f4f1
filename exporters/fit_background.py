"""Fit the posterior map of search's background scoring on the dev split's broadcasts.

    python -m exporters.fit_background --models models [--work runs/fit_background]

Builds (or reuses) the dev broadcasts of exporters/fit_rescoring.py, clean and radio-like,
searches every dev term of at least 6 letters and 150 corpus words never spoken there, and
fits a logistic regression of "the hit is correct" (NIST 2006 matching, 0.5 s midpoint
tolerance) on each hit's posterior features (detector/search.py). The slope and intercept go to the model card (key "background"); the
map changes only how search reports, so indexes stay valid. It also prints dev MTWV with the
background scores and with per-term sum-to-one, for comparison. The held-out broadcasts of
the benchmarks are never used.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from exporters import broadcasts as builder  # noqa: E402
from detector.calibration import fit_platt  # noqa: E402
from detector.evaluate_run import evaluate_hits  # noqa: E402
from detector.evaluation import match_hits, read_reference  # noqa: E402
from detector.indexing import index_archive  # noqa: E402
from detector.models import load  # noqa: E402
from detector.hits import Hit  # noqa: E402
from detector.search import Searcher, posterior_features, twv_margin  # noqa: E402
from detector.spelling import letter_count, word_type  # noqa: E402
from exporters.corpus import load_corpus  # noqa: E402
from exporters.export_onnx import write_json  # noqa: E402

TOP = 100
PHANTOMS = 150  # never-spoken corpus words searched too: a term need not occur


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--models", type=Path, default=ROOT / "models")
    ap.add_argument("--work", type=Path, default=ROOT / "runs" / "fit_background")
    ap.add_argument("--corpus", type=Path, default=builder.DEFAULT_CORPUS)
    ap.add_argument("--no-write", action="store_true", help="print the fit, leave the card alone")
    a = ap.parse_args(argv)
    bdir = a.work / "broadcasts"
    if not (bdir / "manifest.json").exists():
        builder.build(bdir, a.corpus, None, seed=5, split="dev")
    reference = read_reference(bdir / "reference.tsv")
    terms = [t for t, _, _ in builder.read_terms(bdir / "terms.tsv")]
    models_dir = str(a.models.resolve())
    load.cache_clear()
    spoken = {word_type(w) for _, _, _, w in reference}
    lexicon = sorted({word_type(w) for u in load_corpus(a.corpus) for _, _, w in u.words})
    unspoken = [w for w in lexicon if w not in spoken and letter_count(w) >= 6]
    phantoms = [unspoken[i] for i in np.random.default_rng(7).choice(len(unspoken), min(PHANTOMS, len(unspoken)), replace=False)]
    X, ys, report = [], [], {}
    for cond in ("clean", "radio"):
        idx = a.work / f"index-{cond}"
        if not (idx / "trawl-index.json").exists():
            index_archive(bdir / cond, idx, models_dir)
        s = Searcher(idx, models_dir)
        for t in terms + phantoms:
            tt, v = s.query(t)
            r = s.rank(tt, v, TOP, len(s.letter_targets(tt)))
            order = r.order[:TOP]
            hits = [Hit(tt, s.names[r.bi[i]], float(r.starts[i]), float(r.ends[i]), float(r.evidence[i]), 0.0) for i in order]
            X.append(posterior_features(r.evidence[order], *r.background))
            ys += [float(o) for o in match_hits(hits, reference)]
        print(f"{cond}: searched {len(terms)} dev terms and {len(phantoms)} never-spoken words", flush=True)
    X = np.vstack(X)
    pm = fit_platt(X, np.array(ys), l2=0.0)
    weights, intercept = [round(float(w), 4) for w in pm.weights], round(float(pm.intercept), 4)
    print(f"{len(ys)} hits ({int(sum(ys))} correct): log-odds = {weights} . features + {intercept}")
    for cond in ("clean", "radio"):
        s = Searcher(a.work / f"index-{cond}", models_dir)
        s.background_map = (np.array(weights), intercept)
        hits = [h for t in terms for h in s.search(t, top=TOP)]
        report[cond] = {"background, TWV margin": evaluate_hits(hits, reference, terms, s.total_seconds, 0.0, key=twv_margin)["mtwv"],
                        "background, score": evaluate_hits(hits, reference, terms, s.total_seconds, 0.0)["mtwv"]}
        s.scoring = "sum-to-one"
        old = [h for t in terms for h in s.search(t, top=TOP)]
        report[cond]["sum-to-one"] = evaluate_hits(old, reference, terms, s.total_seconds, 0.0)["mtwv"]
        print(json.dumps({"condition": cond, "dev_mtwv": report[cond]}), flush=True)
    if not a.no_write:
        card_path = a.models / "card.json"
        card = json.loads(card_path.read_text(encoding="utf-8"))
        card["background"] = {"weights": weights, "intercept": intercept,
                              "features": ["above background q99", "below best candidate", "above background median",
                                           "log letters"],
                              "fitted_on": f"dev-split broadcasts (clean and radio-like), {len(terms)} terms of >= 6 "
                                           f"letters and {len(phantoms)} never-spoken words, top {TOP} hits each "
                                           f"({len(ys)} hits)",
                              "command": "python -m exporters.fit_background", "dev_mtwv": report}
        write_json(card, card_path)
    return weights, intercept, report


if __name__ == "__main__":
    main()
