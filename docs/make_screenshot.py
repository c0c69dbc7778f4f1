"""Take the README's picture of the checking page (docs/check-page.png) on the demo archive.

    python docs/make_screenshot.py [--index DIR]

Suggests 40 demo hits to check (as `trawl adapt --suggest 40` does; sorted by term and rank), marks the first five
from the demo's ground truth (as an archivist would by ear), serves them with `trawl check
--no-browser`, and photographs the page in Debian's headless Chromium (selenium).
"""

from __future__ import annotations

import argparse
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
sys.path.insert(0, str(ROOT))

from detector.checking import CheckFile  # noqa: E402
from detector.evaluation import match_hits, read_reference  # noqa: E402
from detector.export import write_csv  # noqa: E402
from detector.indexing import index_archive  # noqa: E402
from detector.workflows import suggest_for_adaptation  # noqa: E402

DEMO = ROOT / "demo_broadcasts"


def main():
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--index", type=Path, default=None, help="an index of demo_broadcasts/ (default: build one)")
    ap.add_argument("--out", type=Path, default=HERE / "check-page.png")
    a = ap.parse_args()
    work = Path(tempfile.mkdtemp())
    index = a.index or work / "index"
    index_archive(DEMO, index)
    terms = [t.strip() for t in (DEMO / "terms.txt").read_text(encoding="utf-8").splitlines() if t.strip()]
    hits = sorted(suggest_for_adaptation(index, terms, 40), key=lambda h: (terms.index(h.term), h.rank))  # grouped by term
    sample = work / "sample.csv"
    write_csv(hits, sample, calibrated=False)
    correct = match_hits(hits, read_reference(DEMO / "ground_truth.tsv"))
    f = CheckFile(sample)
    for n in range(5):
        f.set(n, bool(correct[n]))
    proc = subprocess.Popen([sys.executable, "-c", "from detector.cli import app; app()", "check", str(sample),
                             "--index", str(index), "--no-browser"], cwd=ROOT, stdout=subprocess.PIPE, text=True)
    url = proc.stdout.readline().strip()
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service
    from selenium.webdriver.common.by import By

    opts = webdriver.ChromeOptions()
    opts.binary_location = "/usr/bin/chromium"
    for arg in ("--headless=new", "--no-sandbox", "--window-size=1280,900", "--mute-audio",
                "--autoplay-policy=no-user-gesture-required", "--hide-scrollbars"):
        opts.add_argument(arg)
    driver = webdriver.Chrome(options=opts, service=Service("/usr/bin/chromedriver"))
    try:
        time.sleep(1.0)
        driver.get(url)
        for _ in range(100):
            if driver.find_element(By.TAG_NAME, "body").get_attribute("data-loaded") is not None:
                break
            time.sleep(0.1)
        driver.find_element(By.TAG_NAME, "body").send_keys("r")
        time.sleep(1.6)  # the playhead part-way through the clip
        driver.save_screenshot(str(a.out))
    finally:
        driver.quit()
        proc.send_signal(signal.SIGINT)
        proc.wait(timeout=20)
    print(f"wrote {a.out}")


if __name__ == "__main__":
    main()
