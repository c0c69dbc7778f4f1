"""Audio input: decoding broadcasts to mono 16 kHz float32, with clear errors for bad files."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from . import TrawlError
from .features import SAMPLE_RATE

EXTENSIONS = {".wav", ".flac", ".mp3", ".ogg", ".opus", ".oga"}


def as_mono(samples, sample_rate) -> np.ndarray:
    """Validate a signal given to the API and mix it down to mono float32."""
    if not isinstance(sample_rate, (int, np.integer)) or sample_rate <= 0:
        raise ValueError(f"sample_rate must be a positive integer, got {sample_rate!r}")
    x = np.asarray(samples)
    if x.dtype.kind not in "fiu":
        raise ValueError("samples must be numbers")
    if x.dtype.kind in "iu":
        x = x.astype(np.float32) / float(np.iinfo(x.dtype).max)
    if x.ndim == 2:
        x = x.mean(axis=1 if x.shape[1] <= 8 else 0)
    if x.ndim != 1:
        raise ValueError("samples must be a 1-D mono signal (or 2-D with channels)")
    if x.size == 0:
        raise ValueError("samples are empty")
    if not np.isfinite(x).all():
        raise ValueError("samples contain NaN or infinite values")
    return x.astype(np.float32, copy=False)


def resample(x: np.ndarray, sample_rate: int) -> np.ndarray:
    import soxr

    return soxr.resample(x, sample_rate, SAMPLE_RATE, quality="HQ").astype(np.float32)


def load(path: Path | str, block_seconds: float = 60.0) -> np.ndarray:
    """Decode an audio file to mono float32 at SAMPLE_RATE. Raises TrawlError for bad files."""
    import soundfile as sf
    import soxr

    path = Path(path)
    if not path.is_file():
        raise TrawlError(f"{path}: {'is a folder, not an audio file' if path.is_dir() else 'no such file'}")
    if path.suffix.lower() not in EXTENSIONS:
        raise TrawlError(f"{path}: unsupported audio format {path.suffix or '(no extension)'}")
    try:
        info = sf.info(str(path))
    except Exception:  # libsndfile's own messages mislead (a damaged MP3 "does not exist")
        if path.stat().st_size == 0:
            raise TrawlError(f"{path}: the file is empty") from None
        raise TrawlError(f"{path}: cannot decode it: damaged, truncated or not really {path.suffix[1:].upper()} audio") from None
    if info.frames == 0 or info.samplerate <= 0:
        raise TrawlError(f"{path}: the file holds no audio")
    pieces = []
    stream = None if info.samplerate == SAMPLE_RATE else soxr.ResampleStream(info.samplerate, SAMPLE_RATE, 1, dtype="float32", quality="HQ")
    try:
        block = int(block_seconds * info.samplerate)
        for chunk in sf.blocks(str(path), blocksize=block, dtype="float32", always_2d=True):
            mono = chunk.mean(axis=1).astype(np.float32)
            pieces.append(stream.resample_chunk(mono) if stream else mono)
        if stream:
            pieces.append(stream.resample_chunk(np.zeros(0, np.float32), last=True))
    except Exception as e:
        raise TrawlError(f"{path}: the audio is damaged or truncated part-way ({str(e).splitlines()[0][:80]})") from None
    x = np.concatenate(pieces) if pieces else np.zeros(0, np.float32)
    if x.size == 0:
        raise TrawlError(f"{path}: the file holds no audio")
    if not np.isfinite(x).all():
        raise TrawlError(f"{path}: the audio holds invalid (non-finite) samples")
    return x
