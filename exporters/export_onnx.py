"""Export the trained encoders to ONNX (opset 17) with a model card, and check parity."""

from __future__ import annotations

import hashlib
import json
import os
import sys
from datetime import date
from pathlib import Path

import numpy as np
import torch

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from detector.features import FEATURE_PARAMS  # noqa: E402

NORMALISATION = ("per-band sliding mean over ±0.75 s removed (exporters/model.py, sliding_mean_removed), then fixed "
                 "per-band mean/std from training data; inside the frame encoder and the letter head")
from detector.pooling import FRAME_SECONDS  # noqa: E402

OPSET = 17
FILES = {"frames": "frame_encoder.onnx", "head": "span_head.onnx", "spelling": "spelling_encoder.onnx"}
# Windows stored in the index: (duration s, hop s). Shorter windows need a finer hop.
WINDOWS = [[0.34, 0.08], [0.52, 0.12], [0.78, 0.16], [1.16, 0.24]]

PROVENANCE = (
    "Mboshi read speech with word alignments (Godard et al., LREC 2018, 'A Very Low Resource Language "
    "Speech Corpus for Computational Language Documentation Experiments'; Mboshi-French parallel corpus), "
    "train split without its third speaker, as provided in the project's shared folder. Research corpus: "
    "credited here, not redistributed. Plus synthetic speech of pseudo-words from Debian's espeak-ng."
)


def file_sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def write_json(obj, path: Path):
    tmp = path.with_suffix(".tmp")
    tmp.write_text(json.dumps(obj, indent=1, ensure_ascii=False) + "\n", encoding="utf-8")
    os.replace(tmp, path)


def export(model, inventory: list[str], out: Path, training: dict) -> dict:
    out.mkdir(parents=True, exist_ok=True)
    model.eval()
    fe, head, sp = model.frames, model.head, model.spell
    frame_dim = fe.out.out_channels
    with torch.no_grad():
        torch.onnx.export(fe, (torch.randn(1, 200, FEATURE_PARAMS["n_mels"]),), str(out / FILES["frames"]),
                          input_names=["logmel"], output_names=["frames"], opset_version=OPSET,
                          dynamic_axes={"logmel": {1: "time"}, "frames": {1: "time2"}}, dynamo=False)
        torch.onnx.export(head, (torch.randn(7, 5 * frame_dim + 1),), str(out / FILES["head"]),
                          input_names=["pooled"], output_names=["embedding"], opset_version=OPSET,
                          dynamic_axes={"pooled": {0: "n"}, "embedding": {0: "n"}}, dynamo=False)

        class Single(torch.nn.Module):
            def __init__(self, enc):
                super().__init__()
                self.enc = enc

            def forward(self, ids):
                return self.enc(ids)

        torch.onnx.export(Single(sp), (torch.tensor([[2, 3, 4, 5]], dtype=torch.long),), str(out / FILES["spelling"]),
                          input_names=["symbols"], output_names=["embedding"], opset_version=OPSET,
                          dynamic_axes={"symbols": {1: "length"}}, dynamo=False)
    card = {
        "name": "trawl-awe",
        "format_version": 1,
        "created": date.today().isoformat(),
        "features": {**FEATURE_PARAMS, "normalisation": NORMALISATION},
        "frame_seconds": FRAME_SECONDS,
        "receptive_frames": fe.receptive_frames,
        "frame_dim": frame_dim,
        "embedding_dim": head.net[-1].out_features,
        "symbols": inventory,
        "windows": WINDOWS,
        "files": {k: {"path": v, "sha256": file_sha256(out / v)} for k, v in FILES.items()},
        "training": training,
        "provenance": PROVENANCE,
        "metrics": {},
    }
    old = out / "card.json"
    if old.exists():  # keep benchmark metrics only when they belong to these same files
        prev = json.loads(old.read_text(encoding="utf-8"))
        if prev.get("files") == card["files"]:
            card["metrics"] = prev.get("metrics", {})
    write_json(card, old)
    return card


def parity(model, out: Path, seed: int = 0) -> float:
    """Largest absolute difference between torch and onnxruntime outputs on random inputs."""
    import onnxruntime as ort

    rng = np.random.default_rng(seed)
    model.eval()
    worst = 0.0
    with torch.no_grad():
        x = rng.standard_normal((1, 333, FEATURE_PARAMS["n_mels"])).astype(np.float32) - 5
        s = ort.InferenceSession(str(out / FILES["frames"]), providers=["CPUExecutionProvider"])
        worst = max(worst, float(np.abs(s.run(None, {"logmel": x})[0] - model.frames(torch.from_numpy(x)).numpy()).max()))
        p = rng.standard_normal((5, 5 * model.frames.out.out_channels + 1)).astype(np.float32)
        s = ort.InferenceSession(str(out / FILES["head"]), providers=["CPUExecutionProvider"])
        worst = max(worst, float(np.abs(s.run(None, {"pooled": p})[0] - model.head(torch.from_numpy(p)).numpy()).max()))
        ids = rng.integers(2, model.spell.emb.num_embeddings, size=(1, 9)).astype(np.int64)
        s = ort.InferenceSession(str(out / FILES["spelling"]), providers=["CPUExecutionProvider"])
        worst = max(worst, float(np.abs(s.run(None, {"symbols": ids})[0] - model.spell(torch.from_numpy(ids)).numpy()).max()))
    return worst
