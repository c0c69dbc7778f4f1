"""Make the demo's checked sample: the demo terms' top hits, with verdicts from the ground truth.

    python demo_broadcasts/make_checked_sample.py [--index DIR]

An archivist would fill the verdicts by listening; here the ground truth plays the archivist
(a hit is "yes" when its midpoint is within 0.5 s of an unmatched occurrence of the term).
The result is a search CSV with its verdict column filled: `trawl calibrate --checked` reads it.
"""

from __future__ import annotations

import argparse
import csv
import io
import sys
import tempfile
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))

from detector.evaluation import match_hits, read_reference  # noqa: E402
from detector.export import write_csv  # noqa: E402
from detector.indexing import index_archive  # noqa: E402
from detector.search import Searcher  # noqa: E402


def main():
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--index", type=Path, default=None, help="an index of demo_broadcasts/ (default: build one)")
    ap.add_argument("--per-term", type=int, default=15)
    ap.add_argument("--out", type=Path, default=HERE / "checked_sample.csv")
    a = ap.parse_args()
    index = a.index or Path(tempfile.mkdtemp()) / "index"
    index_archive(HERE, index)
    s = Searcher(index)
    terms = [t.strip() for t in (HERE / "terms.txt").read_text(encoding="utf-8").splitlines() if t.strip()]
    hits = [h for t in terms for h in s.search(t, top=a.per_term)]
    correct = match_hits(hits, read_reference(HERE / "ground_truth.tsv"))
    buf = io.StringIO()
    write_csv(hits, buf, calibrated=False)  # a search CSV, verdict column empty
    table = list(csv.reader(io.StringIO(buf.getvalue())))
    col = table[0].index("verdict")
    for row, ok in zip(table[1:], correct):  # the ground truth fills the verdicts
        row[col] = "yes" if ok else "no"
    with open(a.out, "w", newline="", encoding="utf-8") as f:
        csv.writer(f).writerows(table)
    print(f"{len(hits)} checked hits ({sum(correct)} correct) of {len(terms)} terms -> {a.out}")


if __name__ == "__main__":
    main()
