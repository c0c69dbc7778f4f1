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
    cut = truncation(path)
    if cut:
        raise TrawlError(f"{path}: the file is truncated ({cut}; only the first {info.frames / info.samplerate:.1f} s "
                         "would decode): copy it again from its source")
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


OGG_MAX_PAGE = 27 + 255 + 255 * 255  # RFC 3533: header, 255 lacing values, 255 segments of 255 bytes


def truncation(path: Path) -> str | None:
    """Why a file that decodes looks cut short, from its container, or None. Decoders read a cut
    Ogg or WAV file to where it stops without a word; the container says more:
    - Ogg (RFC 3533): a whole stream ends with a complete page carrying the end-of-stream flag (0x04);
    - WAV (RIFF): the data chunk declares its size in bytes, which the file must hold.
    (FLAC and MP3 cut mid-frame make the decoder itself fail, which `load` reports.)"""
    import struct

    ext = path.suffix.lower()
    size = path.stat().st_size
    with open(path, "rb") as f:
        if ext in (".ogg", ".opus", ".oga"):
            f.seek(max(0, size - OGG_MAX_PAGE))
            tail = f.read()
            k = tail.rfind(b"OggS")
            if k < 0 or len(tail) - k < 27:
                return "no complete Ogg page at its end"
            nseg = tail[k + 26]
            page = 27 + nseg + sum(tail[k + 27 : k + 27 + nseg])
            if len(tail) - k < page:
                return "its last Ogg page is cut off"
            if not tail[k + 5] & 0x04:
                return "its Ogg stream has no end-of-stream page"
        elif ext == ".wav":
            head = f.read(12)
            if len(head) < 12 or head[:4] != b"RIFF" or head[8:12] != b"WAVE":
                return None  # RF64 and other variants: the decoder decides
            pos = 12
            while pos + 8 <= size:
                f.seek(pos)
                cid, n = struct.unpack("<4sI", f.read(8))
                if cid == b"data":
                    if n not in (0, 0xFFFFFFFF) and pos + 8 + n > size:  # 0 / all ones: length left open by a streaming writer
                        return f"its data chunk declares {n} bytes, the file holds {size - pos - 8}"
                    return None
                pos += 8 + n + (n & 1)
    return None
