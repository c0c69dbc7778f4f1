"""Indexing and searching: round trip, resumption after a crash, bad input, the main job end to end."""

import json
import subprocess
import sys
import textwrap

import numpy as np
import pytest

from detector import TrawlError
from detector.index_store import Index
from detector.indexing import index_archive
from detector.search import Searcher, nms
from detector.spelling import letter_count
from conftest import ROOT


def write_tone(path, seconds=3.0, sr=22050):
    import soundfile as sf

    t = np.arange(int(seconds * sr)) / sr
    sf.write(str(path), (0.1 * np.sin(2 * np.pi * 220 * t)).astype(np.float32), sr)


def test_nms_keeps_one_hit_per_occurrence():
    # Hand-worked: windows 0 and 1 overlap (same occurrence), 2 is elsewhere, 3 is in another broadcast.
    starts = np.array([1.0, 1.2, 5.0, 1.0])
    ends = np.array([1.6, 1.9, 5.5, 1.6])
    groups = np.array([0, 0, 0, 1])
    scores = np.array([0.7, 0.9, 0.5, 0.8])
    assert nms(starts, ends, groups, scores).tolist() == [1, 3, 2]
    # touching but not overlapping windows are both kept
    assert nms(np.array([0.0, 1.0]), np.array([1.0, 2.0]), np.array([0, 0]), np.array([1.0, 0.9])).tolist() == [0, 1]


def test_index_round_trip_and_resume_skip(joined_broadcast, tmp_path):
    folder, name, _ = joined_broadcast
    rep = index_archive(folder, tmp_path / "idx")
    assert rep.indexed == [name] and rep.windows > 0
    idx = Index.open(tmp_path / "idx")
    rows = idx.broadcasts()
    assert rows[0]["path"] == name and rows[0]["in_graph"] == 1 and rows[0]["n_windows"] == rep.windows
    s = Searcher(tmp_path / "idx")
    first = [(h.broadcast, h.start, h.end, round(h.score, 5)) for h in s.search("mósωngώsώ", top=5)]
    again = Searcher(tmp_path / "idx")
    assert [(h.broadcast, h.start, h.end, round(h.score, 5)) for h in again.search("mósωngώsώ", top=5)] == first
    rep2 = index_archive(folder, tmp_path / "idx")
    assert rep2.indexed == [] and rep2.unchanged == [name]


CRASHER = textwrap.dedent("""
    import os, sys
    sys.path.insert(0, {root!r})
    from detector import indexing
    real = indexing.Index.add_broadcast
    count = 0
    def add_then_die(self, *a, **k):
        global count
        real(self, *a, **k)
        count += 1
        if count == 2:
            os._exit(9)  # as abrupt as kill -9: no cleanup, no merge into the graph
    indexing.Index.add_broadcast = add_then_die
    indexing.index_archive({archive!r}, {index!r})
""")


def test_killed_run_leaves_usable_index_and_resumes(joined_broadcast, tmp_path):
    import shutil

    folder, name, _ = joined_broadcast
    arch = tmp_path / "arch"
    arch.mkdir()
    for i in range(3):
        shutil.copy(folder / name, arch / f"b{i}.wav")
        with open(arch / f"b{i}.wav", "ab") as f:  # distinct content hashes
            f.write(b"\0" * (i + 1) * 2)
    code = CRASHER.format(root=str(ROOT), archive=str(arch), index=str(tmp_path / "idx"))
    r = subprocess.run([sys.executable, "-c", code], capture_output=True)
    assert r.returncode == 9
    idx = Index.open(tmp_path / "idx")
    assert [b["path"] for b in idx.broadcasts()] == ["b0.wav", "b1.wav"]
    assert not (tmp_path / "idx" / "graph.hnsw").exists()  # killed before any merge
    hits = Searcher(tmp_path / "idx").search("mósωngώsώ", top=3)  # usable: pending vectors are searched
    assert hits and {h.broadcast for h in hits} <= {"b0.wav", "b1.wav"}
    rep = index_archive(arch, tmp_path / "idx")
    assert rep.indexed == ["b2.wav"] and sorted(rep.unchanged) == ["b0.wav", "b1.wav"]
    assert all(b["in_graph"] == 1 for b in Index.open(tmp_path / "idx").broadcasts())
    assert not list((tmp_path / "idx" / "pending").glob("*.npy"))


def test_bad_files_are_reported_and_skipped(tmp_path):
    arch = tmp_path / "arch"
    (arch / "deep").mkdir(parents=True)
    write_tone(arch / "deep" / "ok.wav")
    (arch / "empty.wav").write_bytes(b"")
    (arch / "junk.mp3").write_bytes(b"ID3" + b"\x00garbage" * 50)
    good = (arch / "deep" / "ok.wav").read_bytes()
    (arch / "truncated.wav").write_bytes(good[:30])
    rep = index_archive(arch, tmp_path / "idx")
    assert rep.indexed == ["deep/ok.wav"]
    assert sorted(p for p, _ in rep.failed) == ["empty.wav", "junk.mp3", "truncated.wav"]
    assert all(str(arch) in msg and "\n" not in msg for _, msg in rep.failed)


def test_empty_archive_and_other_model_are_refused(tmp_path, joined_broadcast):
    (tmp_path / "empty").mkdir()
    with pytest.raises(TrawlError, match="no audio files"):
        index_archive(tmp_path / "empty", tmp_path / "idx")
    assert not (tmp_path / "idx").exists()  # nothing half-written
    folder, _, _ = joined_broadcast
    index_archive(folder, tmp_path / "idx2")
    man = json.loads((tmp_path / "idx2" / "trawl-index.json").read_text())
    man["model_card_sha256"] = "f" * 64
    (tmp_path / "idx2" / "trawl-index.json").write_text(json.dumps(man))
    with pytest.raises(TrawlError, match="another model"):
        Searcher(tmp_path / "idx2")
    with pytest.raises(TrawlError, match="another model"):
        index_archive(folder, tmp_path / "idx2")


def test_stored_windows_equal_api_span_vectors(joined_broadcast, tmp_path):
    """Indexing pools from one pass over the broadcast; the API embeds each span in its own context."""
    import soundfile as sf

    from detector import api
    from detector.windows import window_times

    folder, name, _ = joined_broadcast
    index_archive(folder, tmp_path / "idx")
    idx = Index.open(tmp_path / "idx")
    names, firsts, counts, spans = idx.window_table()
    s, e = window_times(*spans[0], idx.windows)
    pick = np.linspace(0, len(s) - 1, 12).astype(int)
    x, sr = sf.read(str(folder / name), dtype="float32")
    want = api.embed_spans(x, sr, [(float(s[i]), float(e[i])) for i in pick])
    got = idx.vectors(firsts[0] + pick)
    assert np.abs(want - got).max() < 1e-4


@pytest.mark.slow
def test_spoken_word_is_found_near_its_aligned_time(joined_broadcast, tmp_path):
    """End to end on real speech: words of >= 6 letters are found within 0.5 s of their alignment."""
    folder, name, words = joined_broadcast
    index_archive(folder, tmp_path / "idx")
    s = Searcher(tmp_path / "idx")
    targets = {}
    for st, en, w in words:
        if letter_count(w) >= 6 and en - st <= 1.6:
            targets.setdefault(w, []).append((st + en) / 2)
    assert len(targets) >= 3
    found = 0
    for w, mids in targets.items():
        hits = s.search(w, top=10)
        if any(abs((h.start + h.end) / 2 - m) <= 0.5 for h in hits for m in mids):
            found += 1
    assert found / len(targets) >= 0.6, f"found {found} of {len(targets)} words among the top 10"


@pytest.mark.slow
def test_an_index_past_one_shard_searches_all_its_shards(joined_broadcast, tmp_path, monkeypatch):
    """With a tiny shard capacity the broadcast's windows spread over several graph files;
    its words are still found (same criterion as above) and the vectors read back exactly."""
    import detector.index_store as store

    monkeypatch.setattr(store, "SHARD_CAPACITY", 400)
    folder, name, words = joined_broadcast
    index_archive(folder, tmp_path / "idx")
    assert (tmp_path / "idx" / "graph-1.hnsw").exists()
    s = Searcher(tmp_path / "idx")
    assert len(s.graph.shards) >= 2 and s.graph.largest_shard() <= 400
    labels = np.arange(s.graph.get_current_count())
    np.testing.assert_allclose(np.linalg.norm(s.index.vectors(labels), axis=1), 1.0, atol=1e-4)
    targets = {}
    for st, en, w in words:
        if letter_count(w) >= 6 and en - st <= 1.6:
            targets.setdefault(w, []).append((st + en) / 2)
    found = sum(any(abs((h.start + h.end) / 2 - m) <= 0.5 for h in s.search(w, top=10) for m in mids)
                for w, mids in targets.items())
    assert found / len(targets) >= 0.6, f"found {found} of {len(targets)} words among the top 10"
