"""Non-speech gating: which stretches of a broadcast are worth indexing.

Silence and music without speech are dropped; talk over a music bed is kept
(see the "Gating" section of the shared contracts). Pure numpy functions over the
log-mel features of `detector.features.log_mel` (natural-log mel energies,
one frame per hop).

How a frame is judged, in three steps:

1. Energy. The speech-band energy (mel bands centred in 300-3400 Hz) must clear
   an absolute floor (about 6.5 dB above what digital silence gives, roughly
   -65 dBFS) and a floor relative to the file's own quiet level (a low
   percentile plus a margin), so that silence and low steady hiss are dropped.
2. Speech-likeness. Speech energy rises and falls with the syllables, about
   2-8 times a second, by 10 dB and more; music beds, tones and hiss change
   slowly or not at all. The measure is the RMS, over about 0.6 s, of the log
   energy of four sub-bands of 300-3400 Hz, band-passed to the syllable rate
   (difference of two moving averages: half power near 1.8 and 6 Hz), averaged
   over the sub-bands. Working on log energies makes it a
   *relative* modulation depth, independent of loudness, so speech stays
   visible over a music bed: the bed fills the syllable gaps but the syllables
   still stand out above it. Before band-passing, bursts shorter than ~70 ms
   (clicks, drum hits) are removed from each sub-band by a grey-scale opening
   (running minimum, then running maximum), so a regular beat does not pass
   for syllables.
3. Smoothing. Gaps shorter than ~0.3 s are filled, islands shorter than
   ~0.2 s dropped, and a short hangover keeps soft word edges.

Known limits (by design of so simple a gate): music whose loudness itself
pulses at syllable rate (a fast, staccato melody; drum hits that ring for
longer than ~70 ms, several a second) can pass for speech; an abrupt change of level (music cut to silence)
marks about half a second of the louder side as speech.

Locality: the modulation measure looks at under half a second on each side of
a frame (under a second with the smoothing), but the quiet level of the energy
gate comes from the whole input. Give `speech_mask` the features of a whole
broadcast (an hour is 360,000 x 40 frames, ~58 MB as float32, gated in under a
second on two cores), not chunks of it.
"""

from __future__ import annotations

import numpy as np

from detector.features import FEATURE_PARAMS, HOP_SECONDS

__all__ = ["speech_mask", "speech_regions"]

# Speech band and its split into sub-bands (Hz).
_SPEECH_LOW_HZ = 300.0
_SPEECH_HIGH_HZ = 3400.0
_N_SUBBANDS = 4

# Energy gate (nepers: natural-log units; 1 neper of power is ~4.34 dB).
_ABS_MARGIN = 1.5  # above the digital-silence value of the speech band
_REL_PERCENTILE = 10.0  # the file's quiet level
_REL_MARGIN = 0.7  # ~3 dB above it

# Speech-likeness (seconds, nepers).
_BURST_SECONDS = 0.07  # bursts shorter than this are removed before measuring
_SHORT_SECONDS = 0.07  # moving average: half power near 6 Hz, first null at 14 Hz
_LONG_SECONDS = 0.25  # moving average: half power near 1.8 Hz (subtracted, a high-pass)
_RMS_SECONDS = 0.6  # window of the modulation RMS
_MOD_THRESHOLD = 0.5  # nepers RMS of the 2-8 Hz band-passed sub-band log energy

# Smoothing (seconds).
_FILL_GAP_SECONDS = 0.3
_MIN_ISLAND_SECONDS = 0.2
_HANGOVER_SECONDS = 0.15


def _slaney_hz_to_mel(hz: np.ndarray) -> np.ndarray:
    """Slaney's mel scale (linear below 1 kHz, logarithmic above), as in features."""
    hz = np.asarray(hz, dtype=np.float64)
    f_sp, min_log_hz = 200.0 / 3.0, 1000.0
    min_log_mel = min_log_hz / f_sp
    logstep = np.log(6.4) / 27.0
    safe = np.maximum(hz, min_log_hz)
    return np.where(hz >= min_log_hz, min_log_mel + np.log(safe / min_log_hz) / logstep, hz / f_sp)


def _slaney_mel_to_hz(mel: np.ndarray) -> np.ndarray:
    mel = np.asarray(mel, dtype=np.float64)
    f_sp, min_log_hz = 200.0 / 3.0, 1000.0
    min_log_mel = min_log_hz / f_sp
    logstep = np.log(6.4) / 27.0
    return np.where(mel >= min_log_mel, min_log_hz * np.exp(logstep * (mel - min_log_mel)), f_sp * mel)


def _band_centres_hz(n_mels: int) -> np.ndarray:
    """Centre frequency of each mel band of `log_mel` (Hz)."""
    lo, hi = _slaney_hz_to_mel(np.array([FEATURE_PARAMS["fmin"], FEATURE_PARAMS["fmax"]]))
    return _slaney_mel_to_hz(np.linspace(lo, hi, n_mels + 2))[1:-1]


def _frames(seconds: float, hop_seconds: float, odd: bool = False) -> int:
    n = max(1, int(round(seconds / hop_seconds)))
    return n + 1 if odd and n % 2 == 0 else n


def _moving(x: np.ndarray, width: int, how: str) -> np.ndarray:
    """Centred running mean / min / max along axis 0 (odd width, edges repeated)."""
    if width <= 1:
        return x.astype(np.float64, copy=True)
    half = width // 2
    padded = np.pad(x, [(half, half)] + [(0, 0)] * (x.ndim - 1), mode="edge")
    if how == "mean":
        c = np.cumsum(padded, axis=0, dtype=np.float64)
        c = np.concatenate([np.zeros((1,) + c.shape[1:]), c], axis=0)
        return (c[width:] - c[:-width]) / width
    pick = np.minimum if how == "min" else np.maximum
    out = padded[: len(x)].copy()
    for k in range(1, width):  # a few shifted copies, not a loop over frames
        pick(out, padded[k : k + len(x)], out=out)
    return out


def _runs(mask: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Start and end (exclusive) frame indices of the True runs of a 1-D mask."""
    edges = np.diff(np.concatenate([[0], mask.astype(np.int8), [0]]))
    return np.flatnonzero(edges == 1), np.flatnonzero(edges == -1)


def _fill_gaps(mask: np.ndarray, max_gap: int) -> np.ndarray:
    """Set False runs of at most max_gap frames that lie between True runs."""
    starts, ends = _runs(mask)
    out = mask.copy()
    if len(starts) < 2:
        return out
    gap_start, gap_end = ends[:-1], starts[1:]
    short = (gap_end - gap_start) <= max_gap
    _paint(out, gap_start[short], gap_end[short], True)
    return out


def _drop_islands(mask: np.ndarray, min_len: int) -> np.ndarray:
    """Clear True runs shorter than min_len frames."""
    starts, ends = _runs(mask)
    out = mask.copy()
    short = (ends - starts) < min_len
    _paint(out, starts[short], ends[short], False)
    return out


def _paint(out: np.ndarray, starts: np.ndarray, ends: np.ndarray, value: bool) -> None:
    """out[s:e] = value for every (s, e), without a Python loop."""
    if len(starts) == 0:
        return
    delta = np.zeros(len(out) + 1, dtype=np.int64)
    np.add.at(delta, starts, 1)
    np.add.at(delta, ends, -1)
    out[np.cumsum(delta[:-1]) > 0] = value


def _speech_bands(n_mels: int) -> list[np.ndarray]:
    centres = _band_centres_hz(n_mels)
    idx = np.flatnonzero((centres >= _SPEECH_LOW_HZ) & (centres <= _SPEECH_HIGH_HZ))
    if len(idx) < _N_SUBBANDS:
        raise ValueError(f"only {len(idx)} mel bands lie in the speech band; need {_N_SUBBANDS}")
    return list(np.array_split(idx, _N_SUBBANDS))


def _modulation(sub: np.ndarray, hop_seconds: float) -> np.ndarray:
    """Per-frame syllabic modulation (nepers RMS) of sub-band log energies (frames, k)."""
    burst = _frames(_BURST_SECONDS, hop_seconds, odd=True)
    opened = _moving(_moving(sub, burst, "min"), burst, "max")
    short = _moving(opened, _frames(_SHORT_SECONDS, hop_seconds, odd=True), "mean")
    long = _moving(opened, _frames(_LONG_SECONDS, hop_seconds, odd=True), "mean")
    band = short - long
    power = _moving(band**2, _frames(_RMS_SECONDS, hop_seconds, odd=True), "mean")
    return np.sqrt(power.mean(axis=1))


def speech_mask(logmel: np.ndarray, hop_seconds: float = HOP_SECONDS) -> np.ndarray:
    """Per-frame decision: True where the frame is likely speech (with or without music).

    `logmel` is (n_frames, n_mels) from `detector.features.log_mel`; `hop_seconds`
    the frame hop. Returns a bool array of length n_frames. Deterministic. The quiet
    level of the energy gate comes from the whole input (see the module note on
    locality): pass the features of a whole broadcast, not chunks.
    """
    x = np.asarray(logmel)
    if x.ndim != 2:
        raise ValueError("speech_mask expects a (frames, bands) array")
    n = x.shape[0]
    if n == 0:
        return np.zeros(0, dtype=bool)
    groups = _speech_bands(x.shape[1])
    cols = np.concatenate(groups)
    member = np.zeros((len(cols), len(groups)), dtype=np.float32)
    member[np.arange(len(cols)), np.repeat(np.arange(len(groups)), [len(g) for g in groups])] = 1.0
    # log-mel values are bounded (>= log(log_floor)), so a plain exp is safe in float32
    power = np.exp(x[:, cols].astype(np.float32)) @ member  # (frames, sub-bands)
    sub = np.log(power, dtype=np.float64)

    # 1. energy gate on the whole speech band
    energy = np.log(power.sum(axis=1, dtype=np.float64))
    silence_value = np.log(len(cols) * FEATURE_PARAMS["log_floor"])
    quiet = np.percentile(energy, _REL_PERCENTILE)
    loud_enough = energy > max(silence_value + _ABS_MARGIN, quiet + _REL_MARGIN)
    if not loud_enough.any():
        return np.zeros(n, dtype=bool)

    # 2. syllabic modulation of the sub-band log energies
    raw = loud_enough & (_modulation(sub, hop_seconds) > _MOD_THRESHOLD)

    # 3. smoothing: fill short gaps, drop short islands, then a short hangover
    mask = _fill_gaps(raw, _frames(_FILL_GAP_SECONDS, hop_seconds))
    mask = _drop_islands(mask, _frames(_MIN_ISLAND_SECONDS, hop_seconds))
    hang = _frames(_HANGOVER_SECONDS, hop_seconds)
    starts, ends = _runs(mask)
    out = np.zeros(n, dtype=bool)
    _paint(out, np.maximum(starts - hang, 0), np.minimum(ends + hang, n), True)
    return out


def speech_regions(
    mask: np.ndarray, hop_seconds: float = HOP_SECONDS, pad: float = 0.25
) -> list[tuple[float, float]]:
    """Speech regions of a frame mask, in seconds: padded by `pad`, merged, sorted.

    A True run of frames [i, j) becomes (i*hop - pad, j*hop + pad), clipped to
    [0, len(mask)*hop]; regions that then touch or overlap are merged.
    """
    m = np.asarray(mask, dtype=bool)
    if m.ndim != 1:
        raise ValueError("speech_regions expects a 1-D mask")
    if pad < 0:
        raise ValueError("pad must be >= 0")
    starts, ends = _runs(m)
    if len(starts) == 0:
        return []
    s = np.maximum(starts * hop_seconds - pad, 0.0)
    e = np.minimum(ends * hop_seconds + pad, len(m) * hop_seconds)
    # Runs are disjoint, sorted and padded equally, so only neighbours can overlap;
    # decide on whole frames so float rounding cannot split touching regions.
    gap = (starts[1:] - ends[:-1]) * hop_seconds
    new = np.concatenate([[True], gap > 2.0 * pad + 1e-9])
    first = np.flatnonzero(new)
    last = np.concatenate([first[1:] - 1, [len(s) - 1]])
    return [(float(s[a]), float(e[b])) for a, b in zip(first, last)]
