"""Fit the weight of the letter pass in search, on the dev split's broadcasts (never the held-out ones).

    python -m exporters.fit_rescoring --models models [--work runs/fit_rescoring]

The dev utterances (those exporters/train.py keeps out of training for checkpoint selection)
are joined into broadcasts, clean and radio-like, as the search benchmark builds its held-out
ones; each is indexed with the models, every dev term of at least 6 letters is searched with
each (weight, tau) of a grid, and the pair with the best mean MTWV over the two conditions is
written to the model card (key "rescoring"), with the centre of the uncalibrated confidence
(the mean of the two conditions' MTWV thresholds at that pair). These change only how search
ranks and reports: indexes stay valid.
"""

from __future__ import annotations

import argparse
import json
import shutil
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from exporters import broadcasts as builder  # noqa: E402
from detector.evaluate_run import evaluate_hits  # noqa: E402
from detector.evaluation import read_reference  # noqa: E402
from detector.indexing import index_archive  # noqa: E402
from detector.models import load  # noqa: E402
from detector.search import Searcher  # noqa: E402
from exporters.export_onnx import write_json  # noqa: E402

GRID = tuple((w, tau) for w in (0.5, 1.0, 2.0, 3.0) for tau in (0.5, 1.0, 2.0))
TOP = 100


def measure(index_dir: Path, models_dir: str, reference, terms, weights) -> dict[float, dict]:
    s = Searcher(index_dir, models_dir)
    out = {}
    for w, tau in weights:
        s.letter_weight, s.tau = w, tau
        hits = [h for t in terms for h in s.search(t, top=TOP)]
        r = evaluate_hits(hits, reference, terms, s.total_seconds, 0.0)
        out[(w, tau)] = {k: r[k] for k in ("mtwv", "mtwv_threshold", "p_at_10", "recall_at_100")}
        print(json.dumps({"index": index_dir.name, "weight": w, "tau": tau, **out[(w, tau)]}), flush=True)
    return out


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--models", type=Path, default=ROOT / "models")
    ap.add_argument("--work", type=Path, default=ROOT / "runs" / "fit_rescoring")
    ap.add_argument("--corpus", type=Path, default=builder.DEFAULT_CORPUS)
    ap.add_argument("--minutes-total", type=float, default=None)
    ap.add_argument("--no-write", action="store_true", help="print the grid, leave the card alone")
    a = ap.parse_args(argv)
    bdir = a.work / "broadcasts"
    if not (bdir / "manifest.json").exists():
        builder.build(bdir, a.corpus, a.minutes_total, seed=5, split="dev")
    reference = read_reference(bdir / "reference.tsv")
    terms = [t for t, _, _ in builder.read_terms(bdir / "terms.tsv")]
    models_dir = str(a.models.resolve())
    load.cache_clear()
    results = {}
    for cond in ("clean", "radio"):
        idx = a.work / f"index-{cond}"
        if idx.exists():
            shutil.rmtree(idx)
        index_archive(bdir / cond, idx, models_dir)
        results[cond] = measure(idx, models_dir, reference, terms, GRID)
    mean = {g: sum(results[c][g]["mtwv"] for c in results) / len(results) for g in GRID}
    best = max(GRID, key=lambda g: (round(mean[g], 4), -g[0], -g[1]))
    thresholds = [results[c][best]["mtwv_threshold"] for c in results]
    centre = round(sum(thresholds) / len(thresholds), 3)
    print(f"{len(terms)} dev terms; mean MTWV by (weight, tau): " + ", ".join(f"{g}: {mean[g]:.3f}" for g in GRID))
    print(f"chosen weight {best[0]:g}, tau {best[1]:g} (mean dev MTWV {mean[best]:.3f}); confidence centre {centre}")
    if not a.no_write:
        card_path = a.models / "card.json"
        card = json.loads(card_path.read_text(encoding="utf-8"))
        card["rescoring"] = {"weight": best[0], "tau": best[1], "centre": centre, "scale": 1.0,
                             "fitted_on": f"dev-split broadcasts (clean and radio-like), {len(terms)} terms of >= 6 letters",
                             "command": "python -m exporters.fit_rescoring",
                             "grid": {f"{w:g},{tau:g}": {c: results[c][(w, tau)] for c in results} for w, tau in GRID}}
        write_json(card, card_path)
    return best, results


if __name__ == "__main__":
    main()
