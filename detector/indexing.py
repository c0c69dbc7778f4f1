"""Indexing an archive: audio -> features -> speech gate -> frames -> windows -> vectors -> index."""

from __future__ import annotations

import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from . import TrawlError, audio
from .features import HOP_SECONDS, SAMPLE_RATE, log_mel
from .gating import speech_mask, speech_regions
from .index_store import CatalogueDamaged, Index, atomic_write, file_lock, sha256_file
from .letters import letter_logprobs, quantise
from .models import Models, load
from .pooling import pool, prefix_sums
from .windows import enumerate_windows, window_frames

MERGE_EVERY_SECONDS = 300.0  # merge pending vectors into the graph at most this often


@dataclass
class Embedded:
    duration: float
    speech_seconds: float
    starts: np.ndarray  # window start frames (20 ms)
    kinds: np.ndarray  # index into the window schedule
    vectors: np.ndarray  # (n, d) unit rows
    letters: np.ndarray | None = None  # (frames, letters + 1) uint8 posteriors, when the models have a letter head


def embed_broadcast(models: Models, samples: np.ndarray) -> Embedded:
    """All window vectors of one decoded broadcast (mono, SAMPLE_RATE)."""
    feats = log_mel(samples)
    regions = speech_regions(speech_mask(feats), HOP_SECONDS)
    frames = models.frames(feats)
    posteriors = quantise(letter_logprobs(models, feats, frames)) if models.has_letters else None
    n = len(frames)
    all_starts, all_kinds, all_vecs = [], [], []
    for lo, hi in regions:
        starts, kinds = enumerate_windows([(lo, hi)], models.windows, n)
        if len(starts) == 0:
            continue
        a, b = window_frames(starts, kinds, models.windows)
        r0, r1 = int(a.min()), int(b.max())
        seg = frames[r0:r1]
        all_vecs.append(models.head(pool(seg, prefix_sums(seg), a - r0, b - r0)))
        all_starts.append(starts)
        all_kinds.append(kinds)
    dim = models.dim
    vecs = np.concatenate(all_vecs) if all_vecs else np.zeros((0, dim), np.float32)
    vecs /= np.maximum(np.linalg.norm(vecs, axis=1, keepdims=True), 1e-12)
    return Embedded(
        duration=len(samples) / SAMPLE_RATE,
        speech_seconds=float(sum(hi - lo for lo, hi in regions)),
        starts=np.concatenate(all_starts) if all_starts else np.zeros(0, np.int32),
        kinds=np.concatenate(all_kinds) if all_kinds else np.zeros(0, np.uint8),
        vectors=vecs.astype(np.float32),
        letters=posteriors,
    )


file_hash = sha256_file  # an archive file's content hash, as for the index's own files


def find_audio(archive: Path) -> list[Path]:
    if not archive.exists():
        raise TrawlError(f"the archive folder {archive} does not exist")
    if not archive.is_dir():
        raise TrawlError(f"{archive} is not a folder")
    from .clips import CLIPS_MARKER

    clip_folders = {m.parent for m in archive.rglob(CLIPS_MARKER)}  # trawl's own listening clips
    files = [p for p in archive.rglob("*") if p.is_file() and p.suffix.lower() in audio.EXTENSIONS
             and not any(part.startswith(".") for part in p.relative_to(archive).parts)
             and not clip_folders.intersection(p.parents)]
    return sorted(files, key=lambda p: p.relative_to(archive).as_posix())


@dataclass
class Report:
    indexed: list[str] = field(default_factory=list)
    unchanged: list[str] = field(default_factory=list)
    failed: list[tuple[str, str]] = field(default_factory=list)
    removed: list[str] = field(default_factory=list)  # gone from the archive, taken out of the index
    renamed: list[tuple[str, str]] = field(default_factory=list)  # (old, new): same content, new path
    repaired: list[str] = field(default_factory=list)  # damaged index files found (their broadcasts re-embedded)
    excluded: list[str] = field(default_factory=list)  # taken out on request (trawl remove): left out
    total_broadcasts: int = 0  # in the index after the run
    total_windows: int = 0
    audio_seconds: float = 0.0
    speech_seconds: float = 0.0
    windows: int = 0
    wall_seconds: float = 0.0

    @property
    def skipped_seconds(self) -> float:
        return max(0.0, self.audio_seconds - self.speech_seconds)


def open_for_indexing(index_dir: Path, models, rep: Report) -> Index:
    """Open (or create) the index for writing; a damaged catalogue is set aside and the index begun
    again, damaged files' broadcasts are taken out to be embedded again (detector/integrity.py)."""
    from .integrity import check_catalogue, repair, reset_catalogue, verify

    idx = None
    try:
        idx = Index.create_or_open(index_dir, models)
        bad = check_catalogue(idx)
    except CatalogueDamaged as e:
        bad = e
    if bad is not None:
        if idx is not None:
            idx.close()
        reset_catalogue(index_dir)
        rep.repaired.append("catalog.sqlite (set aside as catalog.sqlite.damaged; the whole archive is indexed again)")
        idx = Index.create_or_open(index_dir, models)
    idx.clean_orphans()
    damage = verify(idx)
    if damage:
        repair(idx, damage)
        rep.repaired += [d.line() for d in damage]
    return idx


def index_archive(archive: Path, index_dir: Path, models_dir: str | None = None, progress=None,
                  wait: bool = False) -> Report:
    """Index every audio file under `archive` into `index_dir`, resuming where a run stopped.

    One writer at a time: another run on the same index makes this refuse (IndexBusy) or, with
    `wait`, wait for it. Broadcasts whose files are gone from the archive are taken out; a file
    renamed or moved with the same content keeps its windows under the new path; broadcasts
    held by damaged index files are embedded again.

    `progress(event, **info)` is called with "start" (files, bytes), "file" (path, seconds,
    status) so a caller can show progress.
    """
    archive = Path(archive)
    files = find_audio(archive)
    if not files:
        raise TrawlError(f"no audio files (WAV, FLAC, MP3, Ogg/Opus) under {archive}")
    models = load(models_dir)
    index_dir = Path(index_dir)
    if index_dir.exists() and not index_dir.is_dir():
        raise TrawlError(f"{index_dir} is a file, not an index folder: choose an empty or new folder")
    index_dir.mkdir(parents=True, exist_ok=True)
    with file_lock(index_dir / ".writer.lock", "trawl index", wait):
        return _index_locked(archive, files, index_dir, models, progress)


def _index_locked(archive: Path, files: list[Path], index_dir: Path, models, progress) -> Report:
    rep = Report()
    idx = open_for_indexing(index_dir, models, rep)
    idx.set_archive(archive)
    t0 = last_merge = time.time()
    excluded = idx.excluded()
    rels = {f.relative_to(archive).as_posix(): f for f in files}
    rep.excluded = sorted(r for r in rels if r in excluded)
    rels = {r: f for r, f in rels.items() if r not in excluded}
    digests: dict[str, str] = {}
    gone: dict[str, list[dict]] = {}  # content hash -> broadcasts whose files are gone
    for b in idx.broadcasts():
        if b["path"] not in rels:
            gone.setdefault(b["sha256"], []).append(b)
    if gone:  # renamed or moved with the same content: keep the work, under the new path
        for rel, f in rels.items():
            if idx.known(rel) is None:
                digests[rel] = file_hash(f)
                if gone.get(digests[rel]):
                    b = gone[digests[rel]].pop(0)
                    idx.rename_broadcast(b["id"], rel)
                    rep.renamed.append((b["path"], rel))
        left = [b for bs in gone.values() for b in bs]
        idx.remove_broadcasts([b["id"] for b in left])
        rep.removed = sorted(b["path"] for b in left)
    idx.forget_failures([p for p, _ in idx.failures() if p not in rels])
    if progress:
        progress("start", files=len(files), total_bytes=sum(f.stat().st_size for f in files))
    try:
        for rel, f in rels.items():
            size = f.stat().st_size
            digest = digests.get(rel) or file_hash(f)
            known = idx.known(rel)
            if known and known[1] == digest:
                rep.unchanged.append(rel)
                if progress:
                    progress("file", path=rel, status="unchanged", seconds=0.0, size=size)
                continue
            try:
                samples = audio.load(f)
            except TrawlError as e:
                idx.record_failure(rel, str(e))
                rep.failed.append((rel, str(e)))
                if progress:
                    progress("file", path=rel, status="failed", seconds=0.0, size=size, error=str(e))
                continue
            emb = embed_broadcast(models, samples)
            idx.add_broadcast(rel, digest, emb.duration, emb.speech_seconds, emb.starts, emb.kinds, emb.vectors, emb.letters)
            rep.indexed.append(rel)
            rep.audio_seconds += emb.duration
            rep.speech_seconds += emb.speech_seconds
            rep.windows += len(emb.vectors)
            if progress:
                progress("file", path=rel, status="indexed", seconds=emb.duration, size=size)
            if time.time() - last_merge > MERGE_EVERY_SECONDS:
                idx.merge()
                last_merge = time.time()
        idx.merge()
        rows = idx.broadcasts()
        rep.total_broadcasts, rep.total_windows = len(rows), sum(b["n_windows"] for b in rows)
    finally:
        idx.close()
    rep.wall_seconds = time.time() - t0
    return rep


def remove_from_index(index_dir: Path, paths: list[str], restore: bool = False, wait: bool = False) -> list[str]:
    """Take named broadcasts out of an index now (catalogue, graph, vectors, letters) and keep them
    out of later runs; with `restore`, let later runs index them again. Unknown names are refused
    before anything changes."""
    idx = Index.open(index_dir)
    idx.close()
    with file_lock(Path(index_dir) / ".writer.lock", "trawl remove", wait):
        idx = Index.open(index_dir, write=True)
        try:
            if restore:
                unknown = [p for p in paths if p not in idx.excluded()]
                if unknown:
                    raise TrawlError(f"{unknown[0]} was not removed from {index_dir} (nothing changed)")
                idx.set_excluded(paths, False)
                return list(paths)
            rows = {b["path"]: b for b in idx.broadcasts()}
            unknown = [p for p in paths if p not in rows and p not in idx.excluded()]
            if unknown:
                raise TrawlError(f"{unknown[0]} is not in the index at {index_dir} (names as `trawl search` lists "
                                 "them, relative to the archive folder; nothing changed)")
            idx.remove_broadcasts([rows[p]["id"] for p in paths if p in rows])
            idx.set_excluded(paths)
            idx.merge()
            with idx.snapshot(exclusive=True):
                idx._drop_stale_files()
            return list(paths)
        finally:
            idx.close()


def carry_settings(previous: Path, index: Path) -> list[str]:
    """Copy the settings that survive a change of model (Index.PORTABLE_SETTINGS) from an index
    being replaced into its successor, then delete the replaced one. Returns what was carried."""
    import shutil

    from .index_store import Index

    new = Index.open(index, write=True)
    carried = []
    try:
        with new.settings_change():
            for name in Index.PORTABLE_SETTINGS:
                src = Path(previous) / name
                if src.exists():
                    atomic_write(new.root / name, src.read_bytes())
                    carried.append(name)
    finally:
        new.close()
    shutil.rmtree(previous)
    return carried
