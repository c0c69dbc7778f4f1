"""Listening clips: each hit as a short WAV with context around it."""

from __future__ import annotations

import re
from pathlib import Path



from . import TrawlError
from .index_store import atomic_write

CONTEXT_SECONDS = 0.5
# Written into every clips folder: indexing skips a folder holding it, so clips written inside
# the archive are not indexed as broadcasts on the next run.
CLIPS_MARKER = ".trawl-clips"


def clip_name(hit) -> str:
    stem = re.sub(r"[^\w.-]+", "_", f"{hit.term}_{hit.rank:03d}_{Path(hit.broadcast).stem}_{hit.start:.2f}")
    return stem.strip("_") + ".wav"


def write_clips(hits, folder: Path, archive: str | Path | None) -> list[Path]:
    import io

    import soundfile as sf

    if archive is None:
        raise TrawlError("--clips needs the archive folder (--archive DIR)")
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    atomic_write(folder / CLIPS_MARKER, b"Listening clips written by trawl search --clips; trawl index skips this folder.\n")
    written = []
    for h in hits:
        src = Path(archive) / h.broadcast
        try:
            info = sf.info(str(src))
            sr = info.samplerate
            a = max(0, int((h.start - CONTEXT_SECONDS) * sr))
            b = min(info.frames, int((h.end + CONTEXT_SECONDS) * sr))
            x, _ = sf.read(str(src), start=a, stop=b, dtype="float32", always_2d=True)
        except Exception as e:
            raise TrawlError(f"cannot cut a clip from {src} ({str(e).splitlines()[0][:100]})") from None
        buf = io.BytesIO()
        sf.write(buf, x.mean(axis=1) if x.shape[1] > 1 else x[:, 0], sr, format="WAV", subtype="PCM_16")
        path = folder / clip_name(h)
        atomic_write(path, buf.getvalue())
        written.append(path)
    return written


