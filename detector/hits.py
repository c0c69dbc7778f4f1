"""Hits: one candidate occurrence of a term in a broadcast."""

from __future__ import annotations

from dataclasses import dataclass, field


@dataclass
class Hit:
    term: str  # the term as the user typed it (normalised to NFC)
    broadcast: str  # path relative to the archive root, with '/' separators
    start: float  # seconds from the start of the broadcast
    end: float
    score: float  # ranking score, higher is better, normalised per term
    confidence: float  # P(correct): calibrated when a calibration exists, else an uncalibrated monotone map of score
    rank: int = 0  # 1-based within its term
    accepted: bool | None = None  # at or above the calibrated threshold; None when no calibration exists
    raw: float = 0.0  # cosine similarity between the query and the window embedding
    letters: int = 0  # letters in the term (after NFD, marks removed)
    aligned: bool = False  # times come from aligning the term's letters to the audio (detector/letters.py)
    extra: dict = field(default_factory=dict)  # extra columns, written after `verdict`
