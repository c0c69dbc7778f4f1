"""Fault injection: does the index lose, duplicate or misreport anything under kills, concurrent
runs, searches during a run and damaged files? Target: zero everywhere.

On a copy of the demo archive (`--small`: the three news and notices broadcasts, about 13 minutes)
plus a silent and a noise-only recording, against a clean index of the same archive:
1. kill -9 at `--kills` random moments of one index run after another on the same index, then a
   final run: broadcasts lost and duplicated, and whether the hits equal the clean index's;
2. `--searches` searches, each opening the index afresh, while a run indexes into a new index:
   failures (anything but a clean answer; "no index yet" before the first commit is counted apart);
3. two `trawl index --wait` runs started together on a new index: both exit 0, result = clean;
   without --wait the second refuses (exit 75) in one line;
4. each damaged-file case of issue 16 (letters deleted/truncated, graph deleted/truncated/changed,
   catalogue truncated): `status --verify` names it (exit 3), search answers without a traceback,
   `trawl index` repairs it, and the hits equal the clean ones;
5. mixed archive: hits found in the speech files equal those of an index of the speech files alone.

    python tests/benchmarks/bench_index_faults.py [--small] [--kills 20] [--searches 50] [--seed 0]

Prints a table and a final JSON line (also written to runs/bench_index_faults.json).
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from detector import TrawlError  # noqa: E402
from detector.index_store import Index  # noqa: E402
from detector.search import Searcher  # noqa: E402

CLI = "import sys; sys.path.insert(0, {root!r}); sys.argv[0] = 'trawl'; from detector.cli import app; app()"
SMALL = ["news/evening-bulletin-02.opus", "news/morning-bulletin-01.opus", "notices/community-notices-01.opus"]


def trawl(*args, wait=True, **kw):
    cmd = [sys.executable, "-c", CLI.format(root=str(ROOT)), *map(str, args)]
    if not wait:
        return subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, **kw)
    r = subprocess.run(cmd, capture_output=True, text=True, **kw)
    return r.returncode, r.stdout + r.stderr


def clean_answer(text: str) -> bool:
    errors = [ln for ln in text.splitlines() if ln.startswith("error:")]
    return "Traceback" not in text and len(errors) <= 1 and not any("unexpected" in e for e in errors)


def make_archive(folder: Path, small: bool, extras: bool = True) -> Path:
    import soundfile as sf

    demo = ROOT / "demo_broadcasts"
    names = SMALL if small else sorted(p.relative_to(demo).as_posix() for p in demo.rglob("*.opus"))
    for n in names:
        (folder / n).parent.mkdir(parents=True, exist_ok=True)
        shutil.copy(demo / n, folder / n)
    if extras:  # recordings without speech: silence, and white noise at -26 dBFS
        sf.write(str(folder / "aaa-silence.wav"), np.zeros(16000 * 20, np.float32), 16000)
        noise = np.random.default_rng(1).standard_normal(16000 * 30).astype(np.float32) * 0.05
        (folder / "noise").mkdir(exist_ok=True)
        sf.write(str(folder / "noise" / "static.wav"), noise, 16000)
    return folder


def hits_of(index: Path, terms: list[str], top: int = 20) -> list[tuple]:
    s = Searcher(index)
    return [(h.term, h.broadcast, h.start, h.end, round(h.score, 3)) for t in terms for h in s.search(t, top=top)]


def catalogue_state(index: Path) -> tuple[list[str], int]:
    rows = Index.open(index).broadcasts()
    labels = [lab for b in rows for lab in range(b["first_label"], b["first_label"] + b["n_windows"])]
    return [b["path"] for b in rows], len(labels) - len(set(labels))


def kills(arch: Path, work: Path, n: int, clean_seconds: float, rng, terms: list[str], reference: list) -> dict:
    """Index runs killed (SIGKILL) at random moments, each resuming where the last one stopped; a run
    that finishes before its moment leaves a complete index, which is checked against the clean one
    and then deleted, so that the next kills land in a new run's early work again. After each kill:
    no broadcast committed twice, and a search answers. At the end, a run to completion."""
    idx = work / "killed"
    expected = sorted(p.relative_to(arch).as_posix() for p in arch.rglob("*") if p.is_file())
    done, trials, duplicated, searches_failed, complete_differ, completes, per_kill = 0, 0, 0, 0, 0, 0, []
    while done < n and trials < 4 * n:
        trials += 1
        p = trawl("index", arch, "--index", idx, wait=False)
        time.sleep(float(rng.uniform(0.5, clean_seconds)))
        if p.poll() is not None:  # finished first: a complete index
            if p.returncode != 0:
                raise SystemExit(f"an index run failed (exit {p.returncode}): {p.stderr.read()[-400:]}")
            completes += 1
            complete_differ += hits_of(idx, terms) != reference
            shutil.rmtree(idx)
            continue
        p.send_signal(signal.SIGKILL)
        p.wait()
        done += 1
        if (idx / "trawl-index.json").exists() and (idx / "catalog.sqlite").exists():
            paths, dup = catalogue_state(idx)
            per_kill.append(len(paths))
            duplicated += len(paths) - len(set(paths)) + dup
            code, text = trawl("search", "mokofin", "--index", idx)
            searches_failed += not clean_answer(text) or code not in (0, 1)
        else:
            per_kill.append(0)
    code, text = trawl("index", arch, "--index", idx)
    paths, dup = catalogue_state(idx)
    return {"kills": done, "committed_after_each_kill": per_kill, "complete_runs_between": completes,
            "complete_runs_differing": complete_differ, "final_exit": code,
            "lost": len(set(expected) - set(paths)), "duplicated": duplicated + len(paths) - len(set(paths)) + dup,
            "searches_after_kills_failed": searches_failed, "hits_equal_clean": hits_of(idx, terms) == reference}


def searches_during_run(arch: Path, work: Path, n: int, clean_seconds: float, terms: list[str]) -> dict:
    """An index of the archive, then a second run adding a copy of every file (new names, so each is
    embedded again and merged), with `n` searches spread over it, each opening the index afresh."""
    idx = work / "busy"
    trawl("index", arch, "--index", idx)
    arch2 = work / "arch2"
    shutil.copytree(arch, arch2)
    shutil.copytree(arch, arch2 / "copy")
    p = trawl("index", arch2, "--index", idx, wait=False)
    failures, during, messages = 0, 0, []
    t0 = time.time()
    for i in range(n):
        running = p.poll() is None
        try:
            Searcher(idx).search(terms[i % len(terms)], top=10)
        except Exception as e:  # noqa: BLE001 - any failure at all is what this counts
            failures += 1
            messages.append(f"{type(e).__name__}: {str(e)[:100]}")
        during += running and p.poll() is None
        time.sleep(max(0.0, (i + 1) * clean_seconds / n - (time.time() - t0)))
    p.wait()
    return {"searches": n, "failures": failures, "while_the_run_wrote": during, "run_exit": p.returncode,
            "messages": messages[:3]}


def concurrent(arch: Path, work: Path, terms: list[str], reference: list) -> dict:
    idx = work / "two"
    ps = [trawl("index", arch, "--index", idx, "--wait", wait=False) for _ in range(2)]
    codes = [p.wait() for p in ps]
    same = hits_of(idx, terms) == reference
    idx2 = work / "two-refusing"
    first = trawl("index", arch, "--index", idx2, wait=False)
    time.sleep(3)
    code2, text2 = trawl("index", arch, "--index", idx2)
    first.wait()
    return {"waiting_exits": codes, "waiting_equals_clean": same, "second_without_wait_exit": code2,
            "second_without_wait_one_line": clean_answer(text2) and "pid" in text2,
            "refusing_equals_clean": hits_of(idx2, terms) == reference}


def damaged(arch: Path, work: Path, clean_idx: Path, terms: list[str], reference: list) -> list[dict]:
    out = []
    sys.path.insert(0, str(ROOT / "tests"))
    from test_index_care import DAMAGE_CASES  # the same damage as the tests make

    for case in DAMAGE_CASES:
        idx = work / f"damaged-{case.__name__}"
        shutil.copytree(clean_idx, idx)
        case(idx)
        vcode, vtext = trawl("status", "--index", idx, "--verify")
        scode, stext = trawl("search", "mokofin", "--index", idx)
        t0 = time.time()
        rcode, rtext = trawl("index", arch, "--index", idx)
        repaired = hits_of(idx, terms) == reference
        out.append({"case": case.__name__.replace("damage_", ""), "verify_exit": vcode, "verify_clear": clean_answer(vtext) and "trawl index" in vtext,
                    "search_exit": scode, "search_clear": clean_answer(stext), "repair_exit": rcode,
                    "repair_seconds": round(time.time() - t0, 1), "hits_restored": repaired})
    return out


def mixed(work: Path, small: bool, terms: list[str]) -> dict:
    speech = make_archive(work / "speech-only", small, extras=False)
    idx = work / "speech-only.idx"
    trawl("index", speech, "--index", idx)
    alone = hits_of(idx, terms)
    return {"speech_only_hits": len(alone), "index": idx, "alone": alone}


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--small", action="store_true", help="three demo broadcasts (about 13 min) instead of seven")
    ap.add_argument("--kills", type=int, default=20)
    ap.add_argument("--searches", type=int, default=50)
    ap.add_argument("--seed", type=int, default=0)
    a = ap.parse_args()
    rng = np.random.default_rng(a.seed)
    terms = [t.strip() for t in (ROOT / "demo_broadcasts" / "terms.txt").read_text(encoding="utf-8").splitlines() if t.strip()]
    work = Path(tempfile.mkdtemp(prefix="trawl-faults-"))
    try:
        arch = make_archive(work / "arch", a.small)
        t0 = time.time()
        code, text = trawl("index", arch, "--index", work / "clean")
        clean_seconds = time.time() - t0
        assert code == 0, text
        reference = hits_of(work / "clean", terms)
        print(f"clean index: {clean_seconds:.0f} s, {len(reference)} hits for {len(terms)} terms", flush=True)
        res = {"archive_files": sum(1 for p in arch.rglob('*') if p.is_file()), "clean_index_seconds": round(clean_seconds, 1)}
        k = kills(arch, work, a.kills, clean_seconds, rng, terms, reference)
        res["kill9"] = k
        print(f"kill -9: {k}", flush=True)
        res["searches_during_run"] = searches_during_run(arch, work, a.searches, clean_seconds, terms)
        print(f"searches during a run: {res['searches_during_run']}", flush=True)
        res["two_indexers"] = concurrent(arch, work, terms, reference)
        print(f"two indexers: {res['two_indexers']}", flush=True)
        res["damaged"] = damaged(arch, work, work / "clean", terms, reference)
        for d in res["damaged"]:
            print(f"damaged: {d}", flush=True)
        m = mixed(work, a.small, terms)
        speech_files = {h[1] for h in m["alone"]}
        in_speech = [h for h in reference if h[1] in speech_files]
        alone_set = {h[:4] for h in m["alone"]}
        res["mixed"] = {"hits_in_speech_files_mixed": len(in_speech), "speech_only_hits": m["speech_only_hits"],
                        "hits_differing_in_place": len({h[:4] for h in in_speech} ^ alone_set),
                        "scores_equal": sorted(in_speech) == sorted(m["alone"])}
        print(f"mixed archive: {res['mixed']}", flush=True)
    finally:
        shutil.rmtree(work, ignore_errors=True)
    zero = {"lost": res["kill9"]["lost"], "duplicated": res["kill9"]["duplicated"],
            "search_failures_during_run": res["searches_during_run"]["failures"],
            "search_failures_after_kills": res["kill9"]["searches_after_kills_failed"],
            "kill_hits_differ": int(not res["kill9"]["hits_equal_clean"]) + res["kill9"]["complete_runs_differing"],
            "concurrent_differ": int(not (res["two_indexers"]["waiting_equals_clean"] and res["two_indexers"]["refusing_equals_clean"])),
            "damaged_unclear_or_unrepaired": sum(not (d["verify_exit"] == 3 and d["verify_clear"] and d["search_clear"]
                                                     and d["hits_restored"]) for d in res["damaged"]),
            "mixed_hits_differing": res["mixed"]["hits_differing_in_place"]}
    from rich.console import Console
    from rich.table import Table

    t = Table(title="Fault injection (target: zero everywhere)")
    t.add_column("measure")
    t.add_column("count", justify="right")
    for key, v in zero.items():
        t.add_row(key.replace("_", " "), str(v))
    Console().print(t)
    res["zero_targets"] = zero
    (ROOT / "runs").mkdir(exist_ok=True)
    (ROOT / "runs" / "bench_index_faults.json").write_text(json.dumps(res, indent=1, default=str))
    print(json.dumps(res, default=str))


if __name__ == "__main__":
    os.environ.setdefault("OMP_NUM_THREADS", "2")
    main()
