"""Indexing an archive: audio -> features -> speech gate -> frames -> windows -> vectors -> index."""

from __future__ import annotations

import hashlib
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from . import TrawlError, audio
from .features import HOP_SECONDS, SAMPLE_RATE, log_mel
from .gating import speech_mask, speech_regions
from .index_store import Index
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


def file_hash(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for block in iter(lambda: f.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


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
    audio_seconds: float = 0.0
    speech_seconds: float = 0.0
    windows: int = 0
    wall_seconds: float = 0.0

    @property
    def skipped_seconds(self) -> float:
        return self.audio_seconds - self.speech_seconds


def index_archive(archive: Path, index_dir: Path, models_dir: str | None = None, progress=None) -> Report:
    """Index every audio file under `archive` into `index_dir`, resuming where a run stopped.

    `progress(event, **info)` is called with "start" (files, bytes), "file" (path, seconds,
    status) so a caller can show progress.
    """
    archive = Path(archive)
    files = find_audio(archive)
    if not files:
        raise TrawlError(f"no audio files (WAV, FLAC, MP3, Ogg/Opus) under {archive}")
    models = load(models_dir)
    idx = Index.create_or_open(Path(index_dir), models)
    idx.clean_orphans()
    idx.set_archive(archive)
    rep = Report()
    t0 = last_merge = time.time()
    if progress:
        progress("start", files=len(files), total_bytes=sum(f.stat().st_size for f in files))
    try:
        for f in files:
            rel = f.relative_to(archive).as_posix()
            size = f.stat().st_size
            digest = file_hash(f)
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
    finally:
        idx.close()
    rep.wall_seconds = time.time() - t0
    return rep
