"""Audio augmentation for an archive's conditions: speed, noise and music beds, room
reverberation, telephone/AM band-limiting, low-bitrate codecs, gain. Pure functions of
(signal, rng[, sources]).

Two channel pools, so that one channel stays unseen (held out) for the benchmarks:
- "train": synthetic music beds and real music (Debian's wesnoth-1.16-music, most tracks),
  coloured noise, mains hum and tape crackle, telephone/AM band, Vorbis/Opus/GSM round trips;
- "held": real music tracks never used in training and real broadcast babble (the Urdu
  television excerpts of ../shared), through a 100-5000 Hz band; and, measured on its own,
  the codec2 speech codec at 3200 bit/s, never used in training.
"""

from __future__ import annotations

import io
import shutil
import subprocess
import tempfile
from pathlib import Path

import numpy as np
from scipy.signal import butter, fftconvolve, sosfilt

SR = 16000
MUSIC_DIR = Path("/usr/share/games/wesnoth/1.16/data/core/music")
HELD_MUSIC = ("elvish-theme", "frantic", "knolls", "legends_of_the_north", "love_theme", "nunc_dimittis",
              "revelation", "the_city_falls")  # tracks of the unseen channel (names without .ogg)
EXCERPT_SECONDS = 40.0


def music_sources(pool: str, cache: Path | None = None) -> list[np.ndarray]:
    """Excerpts (EXCERPT_SECONDS at 16 kHz) of the real music tracks of one pool ('train' or 'held').

    Empty when the music package is not installed. Cached as .npy files under `cache`.
    """
    if not MUSIC_DIR.exists():
        return []
    out = []
    for path in sorted(MUSIC_DIR.glob("*.ogg")):
        if (path.stem in HELD_MUSIC) != (pool == "held"):
            continue
        hit = cache / f"music-{path.stem}.npy" if cache else None
        if hit is not None and hit.exists():
            y = np.load(hit)
            if len(y) >= SR:
                out.append(y)
            continue
        import librosa

        y, _ = librosa.load(str(path), sr=SR, mono=True, duration=20.0 + EXCERPT_SECONDS)
        y = y[int(20 * SR):] if len(y) > 30 * SR else y  # past the intro where the track is long enough
        y = (y / (np.std(y) + 1e-9)).astype(np.float32)
        if hit is not None:
            hit.parent.mkdir(parents=True, exist_ok=True)
            np.save(hit, y)
        if len(y) >= SR:  # a track of under a second is no bed
            out.append(y)
    return out


def babble_sources(corpus: Path, limit: int = 60) -> list[np.ndarray]:
    """Real broadcast talk (the held-out noise source): television excerpts, normalised."""
    import soundfile as sf

    out = []
    for path in sorted((corpus / "audio").glob("*.opus"))[:limit]:
        y, sr = sf.read(str(path), dtype="float32", always_2d=True)
        y = y.mean(axis=1)
        if sr != SR:
            import librosa

            y = librosa.resample(y, orig_sr=sr, target_sr=SR)
        out.append((y / (np.std(y) + 1e-9)).astype(np.float32))
    return out


SHARED_CORPORA = Path(__file__).resolve().parents[2] / "shared" / "corpora"
_SOURCES: dict[str, dict] = {}


def channel_sources(pool: str, cache: Path | None = None) -> dict:
    """radio_chain's keyword arguments for one pool: the pool's real music and, for the held-out
    channel, the real babble (when ../shared is present); loaded once per process."""
    if pool not in _SOURCES:
        babble = SHARED_CORPORA / "urdu-broadcast"
        noise = babble_sources(babble) if pool == "held" and babble.exists() else None
        _SOURCES[pool] = {"music": music_sources(pool, cache), "noise": noise, "pool": pool}
    return _SOURCES[pool]


def loop_to(src: np.ndarray, n: int, rng: np.random.Generator) -> np.ndarray:
    """`n` samples of a source, from a random start, looped as needed."""
    start = int(rng.integers(0, max(1, len(src))))
    reps = (start + n) // max(1, len(src)) + 1
    return np.tile(src, reps)[start:start + n].astype(np.float32)


def hum(n: int, rng: np.random.Generator) -> np.ndarray:
    """Mains hum (50 or 60 Hz and its harmonics) with tape hiss and crackle."""
    t = np.arange(n) / SR
    f0 = float(rng.choice([50.0, 60.0]))
    y = sum(np.sin(2 * np.pi * f0 * k * t + rng.uniform(0, 6)) / k for k in range(1, 6))
    y = y + 0.5 * rng.standard_normal(n)
    clicks = rng.random(n) < 2e-4
    y[clicks] += rng.standard_normal(int(clicks.sum())) * 8
    return (y / (np.std(y) + 1e-9)).astype(np.float32)


def reverb(x: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Room reverberation: an impulse response of exponentially decaying noise (RT60 0.2-0.8 s)
    after a direct path (common practice for simulated rooms)."""
    rt60 = rng.uniform(0.2, 0.8)
    n = int(rt60 * SR)
    t = np.arange(n) / SR
    ir = rng.standard_normal(n) * np.exp(-6.9 * t / rt60) * 0.3
    ir[0] = 1.0
    y = fftconvolve(x, ir)[: len(x)]
    return (y * np.std(x) / (np.std(y) + 1e-9)).astype(np.float32)


def _external(x: np.ndarray, encode: list[str], decode: list[str], rate: int) -> np.ndarray | None:
    """A round trip through command-line codecs on 16-bit raw audio at `rate`; None if unavailable."""
    if shutil.which(encode[0]) is None:
        return None
    import soxr

    y = soxr.resample(x, SR, rate) if rate != SR else x
    pcm = (np.clip(y, -1, 1) * 32767).astype("<i2").tobytes()
    with tempfile.TemporaryDirectory() as d:
        raw, enc, dec = Path(d, "in.raw"), Path(d, "coded"), Path(d, "out.raw")
        raw.write_bytes(pcm)
        try:
            subprocess.run([a.format(raw=raw, enc=enc, dec=dec) for a in encode], check=True, capture_output=True)
            subprocess.run([a.format(raw=raw, enc=enc, dec=dec) for a in decode], check=True, capture_output=True)
        except (subprocess.CalledProcessError, OSError):
            return None
        z = np.frombuffer(dec.read_bytes(), dtype="<i2").astype(np.float32) / 32767
    z = soxr.resample(z, rate, SR) if rate != SR else z
    return z[: len(x)] if len(z) >= len(x) else np.pad(z, (0, len(x) - len(z)))


def codec2(x: np.ndarray) -> np.ndarray:
    """codec2 at 3200 bit/s (8 kHz speech codec of amateur digital radio)."""
    y = _external(x, ["c2enc", "3200", "{raw}", "{enc}"], ["c2dec", "3200", "{enc}", "{dec}"], 8000)
    return x if y is None else y.astype(np.float32)


def gsm(x: np.ndarray) -> np.ndarray:
    """GSM 06.10 full-rate (mobile phone-ins), through sox at 8 kHz."""
    raw = ["-t", "raw", "-r", "8000", "-e", "signed", "-b", "16", "-c", "1"]
    y = _external(x, ["sox", *raw, "{raw}", "-t", "gsm", "{enc}"],
                  ["sox", "-t", "gsm", "{enc}", *raw, "{dec}"], 8000)
    return x if y is None else y.astype(np.float32)


def low_bitrate_opus(x: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Opus at 6-12 kbit/s through ffmpeg."""
    kbps = str(int(rng.integers(6, 13)))
    raw = ["-f", "s16le", "-ar", str(SR), "-ac", "1"]
    y = _external(x, ["ffmpeg", "-loglevel", "error", "-y", *raw, "-i", "{raw}", "-c:a", "libopus", "-b:a", kbps + "k",
                      "-f", "ogg", "{enc}"],
                  ["ffmpeg", "-loglevel", "error", "-y", "-i", "{enc}", *raw, "{dec}"], SR)
    return x if y is None else y.astype(np.float32)


def speed(x: np.ndarray, factor: float) -> np.ndarray:
    """Play `factor` times faster (pitch moves too, like tape speed). Durations scale by 1/factor."""
    import soxr

    return soxr.resample(x, SR * factor, SR, quality="HQ").astype(np.float32)


def coloured_noise(n: int, rng: np.random.Generator, slope: float = -1.0) -> np.ndarray:
    """Noise with power spectrum ~ f**slope (0 white, -1 pink)."""
    spec = np.fft.rfft(rng.standard_normal(n))
    f = np.maximum(np.fft.rfftfreq(n, 1 / SR), 20.0)
    y = np.fft.irfft(spec * f ** (slope / 2), n)
    return (y / (np.std(y) + 1e-9)).astype(np.float32)


def music_bed(n: int, rng: np.random.Generator) -> np.ndarray:
    """A synthetic music bed: harmonic chords changing every 1-3 s, and a percussive pulse."""
    t = np.arange(n) / SR
    y = np.zeros(n, np.float32)
    pos = 0
    while pos < n:
        seg = int(SR * rng.uniform(1.0, 3.0))
        root = 110 * 2 ** (rng.integers(0, 12) / 12)
        for ratio in (1.0, 1.26, 1.5, 2.0)[: rng.integers(2, 5)]:
            f0 = root * ratio
            tt = t[pos:pos + seg]
            env = np.minimum(1, (tt - tt[0]) * 20) * np.exp(-(tt - tt[0]) * rng.uniform(0.2, 1.5))
            for h in range(1, 5):
                y[pos:pos + seg] += (env * np.sin(2 * np.pi * f0 * h * tt + rng.uniform(0, 6)) / h).astype(np.float32)
        pos += seg
    beat = int(SR * rng.uniform(0.35, 0.6))
    click = (np.exp(-np.arange(800) / 120) * rng.standard_normal(800)).astype(np.float32)
    for p in range(int(rng.integers(0, beat)), n - 800, beat):
        y[p:p + 800] += 0.8 * click
    return y / (np.std(y) + 1e-9)


def mix(x: np.ndarray, bed: np.ndarray, snr_db: float) -> np.ndarray:
    px = np.mean(x**2) + 1e-12
    pb = np.mean(bed**2) + 1e-12
    return (x + bed * np.sqrt(px / (pb * 10 ** (snr_db / 10)))).astype(np.float32)


def band_limit(x: np.ndarray, low: float, high: float) -> np.ndarray:
    sos = butter(4, [low, high], btype="band", fs=SR, output="sos")
    return sosfilt(sos, x).astype(np.float32)


def telephone(x: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    y = band_limit(x, 300, 3400)
    drive = rng.uniform(1.0, 4.0)
    return (np.tanh(drive * y / (np.abs(y).max() + 1e-9)) / np.tanh(drive)).astype(np.float32) * 0.5


def codec_round_trip(x: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    import soundfile as sf

    buf = io.BytesIO()
    subtype = "VORBIS" if rng.random() < 0.5 else "OPUS"
    sf.write(buf, np.clip(x, -1, 1), SR, format="OGG", subtype=subtype)
    buf.seek(0)
    y, _ = sf.read(buf, dtype="float32")
    return y[: len(x)] if len(y) >= len(x) else np.pad(y, (0, len(x) - len(y)))


def gain(x: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    y = x / (np.abs(x).max() + 1e-9) * 10 ** (rng.uniform(-26, -1) / 20)
    return y.astype(np.float32)


def radio_chain(x: np.ndarray, rng: np.random.Generator, music: list[np.ndarray] | None = None,
                noise: list[np.ndarray] | None = None, pool: str = "train") -> tuple[np.ndarray, float, float]:
    """One random archive condition. Returns (signal, speed factor, seconds of music-only lead-in).

    `music`/`noise`: real sources to draw beds from (else synthetic ones); pool 'held' is the
    unseen channel: no speed change or reverberation, the held-out music and babble, a 100-5000 Hz band.
    """
    held = pool == "held"
    f = 1.0 if held else float(rng.choice([0.9, 0.95, 1.0, 1.05, 1.1]))
    y = speed(x, f) if f != 1.0 else x.copy()
    if not held and rng.random() < 0.25:
        y = reverb(y, rng)
    lead = 0.0
    if held or rng.random() < 0.5:
        lead = float(rng.uniform(0.6, 1.5)) if rng.random() < 0.5 else 0.0
        y = np.concatenate([np.zeros(int(lead * SR), np.float32), y])
        real = music and (held or rng.random() < 0.7)
        bed = loop_to(music[int(rng.integers(len(music)))], len(y), rng) if real else music_bed(len(y), rng)
        y = mix(y, bed, rng.uniform(5, 15) if held else rng.uniform(3, 25))
        if lead:
            y[: int(lead * SR)] = bed[: int(lead * SR)] * np.std(y[int(lead * SR):]) * 10 ** (-rng.uniform(5, 15) / 20)
    if noise:
        bed = loop_to(noise[int(rng.integers(len(noise)))], len(y), rng)
    elif rng.random() < 0.3:
        bed = hum(len(y), rng)
    else:
        bed = coloured_noise(len(y), rng, slope=float(rng.choice([0.0, -1.0, -2.0])))
    y = mix(y, bed, rng.uniform(12, 22) if held else rng.uniform(5, 35))
    if held:
        return gain(band_limit(y, 100, 5000), rng), f, lead
    c = rng.random()
    if c < 0.3:
        y = telephone(y, rng)
    elif c < 0.5:
        y = band_limit(y, 80, 4500)
    k = rng.random()
    if k < 0.15:
        y = codec_round_trip(y, rng)
    elif k < 0.25:
        y = low_bitrate_opus(y, rng)
    elif k < 0.35:
        y = gsm(y)
    return gain(y, rng), f, lead
