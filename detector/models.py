"""The exported encoders (ONNX) and their model card.

The card pins the feature parameters; a card that disagrees with the feature settings
this program computes with, or whose files do not match their recorded hashes, is refused.
"""

from __future__ import annotations

import hashlib
import json
import os
import unicodedata
from functools import lru_cache
from pathlib import Path

import numpy as np

from . import TrawlError
from .features import FEATURE_PARAMS
from .pooling import FRAME_SECONDS

DEFAULT_DIR = Path(__file__).resolve().parents[1] / "models"
CHUNK_FRAMES = 6000  # feature frames (60 s) per frame-encoder pass on long broadcasts


def models_dir() -> Path:
    return Path(os.environ.get("TRAWL_MODELS", DEFAULT_DIR))


def check_card(card: dict) -> None:
    """Raise TrawlError when the card's feature settings differ from this program's."""
    theirs = card.get("features", {})
    # "normalisation" happens inside the model files, so it is the card's own description, not compared
    diffs = [f"{k}: card {theirs.get(k)!r}, program {v!r}" for k, v in FEATURE_PARAMS.items()
             if k != "normalisation" and theirs.get(k) != v]
    if card.get("frame_seconds") != FRAME_SECONDS:
        diffs.append(f"frame_seconds: card {card.get('frame_seconds')!r}, program {FRAME_SECONDS!r}")
    if diffs:
        raise TrawlError("the model card disagrees with this program's feature settings (" + "; ".join(diffs) + ")")


IDENTITY_KEYS = ("features", "frame_seconds", "receptive_frames", "frame_dim", "embedding_dim", "symbols", "windows", "files",
                 "letters")


def model_identity(card: dict) -> str:
    """Hash of what makes the vectors what they are (not of metrics or notes added to the card later)."""
    core = {k: card.get(k) for k in IDENTITY_KEYS}
    return hashlib.sha256(json.dumps(core, sort_keys=True, ensure_ascii=False).encode("utf-8")).hexdigest()


class Models:
    """ONNX sessions for the frame encoder, span head and spelling encoder."""

    def __init__(self, directory: Path | str | None = None):
        import onnxruntime as ort

        self.dir = Path(directory) if directory else models_dir()
        card_path = self.dir / "card.json"
        if not card_path.exists():
            raise TrawlError(f"no model card at {card_path}: the models are missing")
        raw = card_path.read_bytes()
        try:
            self.card = json.loads(raw)
        except json.JSONDecodeError as e:
            raise TrawlError(f"the model card {card_path} is not valid JSON ({e})") from None
        check_card(self.card)
        self.card_hash = model_identity(self.card)
        opts = ort.SessionOptions()
        opts.intra_op_num_threads = int(os.environ.get("TRAWL_THREADS", "0"))
        opts.log_severity_level = 3
        self.sessions = {}
        for key, meta in self.card["files"].items():
            path = self.dir / meta["path"]
            if not path.exists() or hashlib.sha256(path.read_bytes()).hexdigest() != meta["sha256"]:
                raise TrawlError(f"model file {path} is missing or does not match the model card")
            self.sessions[key] = ort.InferenceSession(str(path), opts, providers=["CPUExecutionProvider"])
        self.symbols = self.card["symbols"]
        self.table = {c: i for i, c in enumerate(self.symbols)}
        self.marks = [c for c in self.symbols if len(c) == 1 and unicodedata.combining(c)]  # tone and other marks it reads
        self.dim = int(self.card["embedding_dim"])
        self.context_frames = int(self.card["receptive_frames"])
        self.windows = [tuple(w) for w in self.card["windows"]]
        self.has_letters = "letters" in self.sessions and "letters" in self.card
        self.alphabet = self.card["letters"]["alphabet"] if self.has_letters else []
        self.letter_table = {c: i + 1 for i, c in enumerate(self.alphabet)}  # class 0 is the CTC blank
        self.rescoring = self.card.get("rescoring", {}) if self.has_letters else {}

    # acoustic side -------------------------------------------------------
    def frames(self, logmel: np.ndarray) -> np.ndarray:
        """Frame-encoder outputs (ceil(T/2), H) for features (T, n_mels).

        Long inputs run in overlapping chunks cut on even frames; the overlap exceeds the
        encoder's receptive field, so the result equals one pass over the whole input.
        """
        sess = self.sessions["frames"]
        T = logmel.shape[0]
        if T <= CHUNK_FRAMES + 1000:
            return sess.run(None, {"logmel": logmel[None].astype(np.float32)})[0][0]
        pad = 2 * (self.context_frames + 8)  # feature frames of overlap on each side
        out = []
        for s in range(0, T, CHUNK_FRAMES):
            lo, hi = max(0, s - pad), min(T, s + CHUNK_FRAMES + pad)
            y = sess.run(None, {"logmel": logmel[None, lo:hi].astype(np.float32)})[0][0]
            k0 = (s - lo) // 2
            out.append(y[k0 : k0 + (min(T, s + CHUNK_FRAMES) - s + 1) // 2])
        return np.concatenate(out)

    def head(self, pooled: np.ndarray, batch: int = 8192) -> np.ndarray:
        sess = self.sessions["head"]
        if len(pooled) == 0:
            return np.zeros((0, self.dim), np.float32)
        return np.concatenate([sess.run(None, {"pooled": pooled[i : i + batch]})[0] for i in range(0, len(pooled), batch)])

    # spelling side -------------------------------------------------------
    def spelling(self, syms: list[str]) -> np.ndarray:
        ids = np.array([[self.table.get(c, 1) for c in syms] or [1]], dtype=np.int64)
        return self.sessions["spelling"].run(None, {"symbols": ids})[0][0]


@lru_cache(maxsize=4)
def load(directory: str | None = None) -> Models:
    return Models(directory)
