"""Non-speech gating on constructed signals whose answer is clear by construction.

Silence, steady hiss and a synthetic music bed contain no speech; espeak-ng output
is speech; speech mixed over the music bed is still speech. "Active" frames of an
utterance are those whose level is within 35 dB of its loudest frame, measured on
the clean samples (common practice: level-based activity of a clean recording).
"""

from __future__ import annotations

import shutil
import subprocess
import time
from math import gcd
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf
from scipy.signal import resample_poly

from detector import gating
from detector.features import FEATURE_PARAMS, HOP_SECONDS, SAMPLE_RATE, log_mel
from detector.gating import speech_mask, speech_regions

SR = SAMPLE_RATE
SPEECH_RMS = 0.05  # about -26 dBFS, a usual speech level
TEXT = (
    "The fishermen came back to the village before the rain, and the market opened late. "
    "Everyone asked about the price of salt, and the radio played a song about the river."
)


def frame_level_db(x: np.ndarray) -> np.ndarray:
    """RMS level (dB) of each feature frame: same 25 ms window and centring as log_mel."""
    win, hop = FEATURE_PARAMS["win_length"], FEATURE_PARAMS["hop_length"]
    frames = np.lib.stride_tricks.sliding_window_view(np.pad(x, win // 2), win)[::hop]
    return 10 * np.log10(np.mean(frames.astype(np.float64) ** 2, axis=1) + 1e-12)


def active_frames(speech: np.ndarray) -> np.ndarray:
    level = frame_level_db(speech)
    return level > level.max() - 35.0


def music_bed(
    seconds: float, rms: float = 0.05, seed: int = 0, clicks_per_second: int = 2
) -> tuple[np.ndarray, np.ndarray]:
    """Sustained harmonic chords changing every 2 s (50 ms cross-fades) and a regular
    10 ms click. Returns the signal and the sample index of each click."""
    rng = np.random.default_rng(seed)
    n = int(seconds * SR)
    t = np.arange(n) / SR
    chords = [[220.0, 277.2, 329.6], [196.0, 246.9, 293.7], [174.6, 220.0, 261.6], [164.8, 207.7, 246.9]]
    seg, fade = 2 * SR, int(0.05 * SR)
    y = np.zeros(n)
    for k in range(int(np.ceil(seconds / 2))):
        a, b = k * seg, min(n, (k + 1) * seg + fade)
        env = np.ones(b - a)
        if k > 0:
            env[:fade] = np.linspace(0.0, 1.0, fade)
        if b < n:
            env[-fade:] *= np.linspace(1.0, 0.0, fade)
        for f0 in chords[k % len(chords)]:
            for h in range(1, 9):  # harmonics with 1/h amplitudes
                y[a:b] += env * np.sin(2 * np.pi * f0 * h * t[a:b] + rng.uniform(0, 2 * np.pi)) / h
    y *= rms / np.sqrt(np.mean(y**2))
    click_len = int(0.01 * SR)
    click = rng.standard_normal(click_len) * np.exp(-np.arange(click_len) / (0.002 * SR))
    onsets = np.arange(int(0.25 * SR), n - click_len, SR // clicks_per_second)
    for c in onsets:
        y[c : c + click_len] += 1.0 * click
    return y, onsets


@pytest.fixture(scope="module")
def speech(tmp_path_factory: pytest.TempPathFactory) -> np.ndarray:
    if shutil.which("espeak-ng") is None:
        pytest.skip("espeak-ng is not installed: no real speech to test the gate on")
    wav = Path(tmp_path_factory.mktemp("espeak")) / "speech.wav"
    subprocess.run(["espeak-ng", "-v", "en", "-s", "150", "-w", str(wav), TEXT], check=True)
    x, rate = sf.read(wav, dtype="float64")
    if x.ndim > 1:
        x = x.mean(axis=1)
    g = gcd(SR, rate)
    x = resample_poly(x, SR // g, rate // g)
    return x * (SPEECH_RMS / np.sqrt(np.mean(x**2)))


def mask_of(x: np.ndarray) -> np.ndarray:
    return speech_mask(log_mel(x.astype(np.float32)), HOP_SECONDS)


def over_music(speech: np.ndarray, snr_db: float, seed: int = 1) -> np.ndarray:
    bed, _ = music_bed(len(speech) / SR + 0.1, seed=seed)
    bed = bed[: len(speech)]
    bed *= np.sqrt(np.mean(speech**2) / np.mean(bed**2)) * 10 ** (-snr_db / 20)
    return speech + bed


# --- things that are not speech ------------------------------------------------------


def test_digital_silence_has_no_speech() -> None:
    mask = mask_of(np.zeros(10 * SR))
    assert mask.dtype == bool and len(mask) == 1 + 10 * SR // FEATURE_PARAMS["hop_length"]
    assert not mask.any(), f"speech fraction {mask.mean():.3f} in digital silence"
    assert speech_regions(mask) == []


@pytest.mark.parametrize("level_dbfs", [-60.0, -35.0])
def test_steady_hiss_has_no_speech(level_dbfs: float) -> None:
    noise = np.random.default_rng(3).standard_normal(10 * SR) * 10 ** (level_dbfs / 20)
    mask = mask_of(noise)
    assert mask.mean() == 0.0, f"speech fraction {mask.mean():.3f} in hiss at {level_dbfs} dBFS"


@pytest.mark.parametrize("clicks_per_second", [2, 4])
def test_music_bed_without_speech_is_not_speech(clicks_per_second: int) -> None:
    """A beat at 4 Hz sits right at the syllable rate; only its brevity tells it apart."""
    bed, clicks = music_bed(20.0, clicks_per_second=clicks_per_second)
    logmel = log_mel(bed.astype(np.float32))
    # the clicks must stand out in the speech band, or the test would not test them
    speech_cols = np.concatenate(gating._speech_bands(logmel.shape[1]))
    band_db = 10 / np.log(10) * np.log(np.exp(logmel[:, speech_cols].astype(np.float64)).sum(axis=1))
    at = clicks // FEATURE_PARAMS["hop_length"]
    peaks = np.max([band_db[at - 1], band_db[at], band_db[at + 1]], axis=0)
    prominence = np.median(peaks) - np.median(band_db)
    assert prominence > 15.0, f"clicks only {prominence:.1f} dB above the bed"
    mask = speech_mask(logmel)
    assert mask.mean() <= 0.10, (
        f"speech fraction {mask.mean():.3f} in music without speech ({clicks_per_second} clicks/s)"
    )


# --- things that are speech ----------------------------------------------------------


def test_speech_is_speech(speech: np.ndarray) -> None:
    active = active_frames(speech)
    mask = mask_of(speech)
    frac = mask[: len(active)][active].mean()
    assert frac >= 0.80, f"only {frac:.3f} of {active.sum()} active speech frames gated as speech"


@pytest.mark.parametrize("snr_db", [10.0, 15.0])
def test_speech_over_music_is_speech(speech: np.ndarray, snr_db: float) -> None:
    active = active_frames(speech)
    mask = mask_of(over_music(speech, snr_db))
    frac = mask[: len(active)][active].mean()
    assert frac >= 0.80, f"only {frac:.3f} of active speech frames gated as speech at {snr_db} dB SNR"


def test_music_then_talk_over_music_is_told_apart(speech: np.ndarray) -> None:
    """6 s of the bed alone, then talk over the same bed at 12 dB SNR, in one file."""
    lead = 6 * SR
    bed, _ = music_bed(lead / SR + len(speech) / SR + 0.1, seed=2)
    bed = bed[: lead + len(speech)] * (np.sqrt(np.mean(speech**2)) / SPEECH_RMS) * 10 ** (-12 / 20)
    mix = bed.copy()
    mix[lead:] += speech
    mask = mask_of(mix)
    hop = FEATURE_PARAMS["hop_length"]
    onset = lead // hop + int(np.flatnonzero(active_frames(speech))[0])
    before = mask[: onset - int(1.0 / HOP_SECONDS)].mean()  # the bed alone, >= 1 s before the talk
    active = np.zeros(len(mask), dtype=bool)
    act = active_frames(speech)
    active[lead // hop : lead // hop + len(act)] = act[: len(mask) - lead // hop]
    during = mask[active].mean()
    assert before <= 0.10, f"speech fraction {before:.3f} in the music before the talk"
    assert during >= 0.80, f"only {during:.3f} of the talk over music gated as speech"


@pytest.mark.parametrize("lead_dbfs", [None, -60.0])
def test_region_starts_near_onset(speech: np.ndarray, lead_dbfs: float | None) -> None:
    """5 s of digital silence (None) or of low hiss, then speech."""
    lead = 5 * SR
    x = np.concatenate([np.zeros(lead), speech])
    if lead_dbfs is not None:
        x += np.random.default_rng(4).standard_normal(len(x)) * 10 ** (lead_dbfs / 20)
    regions = speech_regions(mask_of(x), HOP_SECONDS, pad=0.25)
    onset = lead / SR + np.flatnonzero(active_frames(speech))[0] * HOP_SECONDS
    assert regions, "no speech region found"
    start = regions[0][0]
    assert abs(start - onset) <= 0.5, f"first region starts at {start:.2f} s, speech at {onset:.2f} s"
    assert regions[-1][1] >= len(x) / SR - 0.5, f"last region ends at {regions[-1][1]:.2f} s"


def test_mask_does_not_depend_on_overall_loudness(speech: np.ndarray) -> None:
    """The measure is relative: 20 dB quieter (still far above the floor) gives the same mask."""
    mix = over_music(speech, 12.0)
    loud, quiet = mask_of(mix), mask_of(0.1 * mix)
    agree = np.mean(loud == quiet)
    assert agree >= 0.99, f"masks agree on only {agree:.3f} of frames"


def test_one_hour_of_frames_is_fast(speech: np.ndarray) -> None:
    clip = log_mel(over_music(speech, 12.0).astype(np.float32))
    hour = np.tile(clip, (360000 // len(clip) + 1, 1))[:360000]
    t0 = time.perf_counter()
    mask = speech_mask(hour)
    took = time.perf_counter() - t0
    assert len(mask) == 360000 and mask.mean() > 0.5
    assert took < 3.0, f"one hour of frames took {took:.2f} s"


# --- hand-worked examples of the mask and region logic --------------------------------


def _m(s: str) -> np.ndarray:
    return np.array([c == "1" for c in s])


def test_fill_gaps_by_hand() -> None:
    # gaps of 2 and 3 frames between runs; max_gap=2 fills only the first; edges stay
    got = gating._fill_gaps(_m("0011001110001100"), 2)
    assert "".join("1" if v else "0" for v in got) == "0011111110001100"


def test_drop_islands_by_hand() -> None:
    got = gating._drop_islands(_m("1001100111011110"), 3)
    assert "".join("1" if v else "0" for v in got) == "0000000111011110"


def test_speech_regions_by_hand() -> None:
    hop = 0.01
    mask = np.zeros(100, dtype=bool)
    mask[10:20] = True  # 0.10-0.20 s
    mask[30:35] = True  # 0.30-0.35 s: gap 0.10 s, exactly 2 * pad -> merged
    mask[60:70] = True  # 0.60-0.70 s: separate
    mask[95:] = True  # clipped at 1.00 s
    got = speech_regions(mask, hop, pad=0.05)
    want = [(0.05, 0.40), (0.55, 0.75), (0.90, 1.00)]
    assert len(got) == len(want)
    for (a, b), (c, d) in zip(got, want):
        assert a == pytest.approx(c) and b == pytest.approx(d)
    assert speech_regions(mask, hop, pad=0.0)[0] == pytest.approx((0.10, 0.20))
    assert speech_regions(np.ones(50, dtype=bool), hop, pad=0.3) == [(0.0, pytest.approx(0.5))]
    assert speech_regions(np.zeros(50, dtype=bool)) == []


def test_bad_inputs() -> None:
    assert speech_mask(np.zeros((0, 40), dtype=np.float32)).shape == (0,)
    with pytest.raises(ValueError):
        speech_mask(np.zeros(40))
    with pytest.raises(ValueError):
        speech_regions(np.zeros((2, 2), dtype=bool))
    with pytest.raises(ValueError):
        speech_regions(np.zeros(5, dtype=bool), pad=-1.0)
