"""Train the letter head (CTC over base letters) on top of the frozen, exported frame encoder.

    python -m exporters.train_letters --synth runs/synth.pkl --minutes 30 --models models
    python -m exporters.train_letters --quick --models /tmp/m   # a minute, for the tests

Search uses the head's per-frame letter posteriors to re-score the candidates the HNSW index
returns: a spelling is aligned to the posteriors of a candidate's stretch of audio (CTC
keyword scoring with a free start and end), which separates near-homophones that the
64-dim embeddings confuse. The frame encoder is frozen so the index's vectors stay valid;
its frames are computed with the exported ONNX file, exactly as indexing computes them.

Connectionist temporal classification: Graves et al., ICML 2006.
"""

from __future__ import annotations

import argparse
import json
import math
import random
import sys
import time
from pathlib import Path

import numpy as np
import torch
import torch.nn.functional as F

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from detector.letters import alphabet_of, letter_ids  # noqa: E402
from detector.models import Models  # noqa: E402
from exporters.corpus import corpus_splits  # noqa: E402
from exporters.edit_distance import pairwise  # noqa: E402
from exporters.model import LetterHead, sliding_mean_removed  # noqa: E402
from exporters.train import build_items, perturb, quick_synthetic, synthetic_utterances  # noqa: E402

SILENCE = math.log(1e-6)


def prepare(items, models: Models, table: dict) -> list[dict]:
    """Per utterance: log-mel features, frozen frame vectors and the letter targets in time order."""
    out = []
    for it in items:
        feats = it["feats"].astype(np.float32)
        words = sorted(it["words"])
        if words:
            target = [i for _, _, w in words for i in letter_ids(w, table)]
        else:  # a transcript without word times; one with digits is not spelled as it is read
            text = it.get("transcript", "")
            target = [] if any(c.isdigit() for c in text) else letter_ids(" ".join(text.lower().split()), table)
        frames = models.frames(feats)
        if not target or len(target) > len(frames):
            continue
        out.append({"feats": feats.astype(np.float16), "frames": frames.astype(np.float16), "target": target})
    return out


def batch(data, idx):
    T2 = max(len(data[i]["frames"]) for i in idx)
    T = max(len(data[i]["feats"]) for i in idx)
    fr = np.zeros((len(idx), T2, data[idx[0]]["frames"].shape[1]), np.float32)
    lm = np.full((len(idx), max(T, 2 * T2 - 1), data[idx[0]]["feats"].shape[1]), SILENCE, np.float32)
    mask = np.zeros(lm.shape[:2], np.float32)
    for k, i in enumerate(idx):
        d = data[i]
        fr[k, : len(d["frames"])] = d["frames"]
        lm[k, : len(d["feats"])] = d["feats"]
        mask[k, : len(d["feats"])] = 1
    lens = torch.tensor([len(data[i]["frames"]) for i in idx])
    tg = [torch.tensor(data[i]["target"]) for i in idx]
    return (torch.from_numpy(fr), torch.from_numpy(lm), lens, torch.cat(tg), torch.tensor([len(t) for t in tg]),
            torch.from_numpy(mask))


def greedy(logp: np.ndarray) -> list[int]:
    best = logp.argmax(1)
    return [int(c) for k, c in enumerate(best) if c != 0 and (k == 0 or c != best[k - 1])]


@torch.no_grad()
def letter_error_rate(head, data) -> float:
    head.eval()
    errs = total = 0
    for s in range(0, len(data), 32):
        idx = list(range(s, min(len(data), s + 32)))
        fr, lm, lens, _, _, mask = batch(data, idx)
        lp = head(fr, lm, mask).numpy()
        for k, i in enumerate(idx):
            errs += int(pairwise([greedy(lp[k, : lens[k]])], [data[i]["target"]])[0, 0])
            total += len(data[i]["target"])
    head.train()
    return errs / max(1, total)


def export(head, models_dir: Path, alphabet: list[str], training: dict) -> dict:
    from exporters.export_onnx import OPSET, file_sha256, write_json

    path = models_dir / "letter_head.onnx"
    head.eval()
    with torch.no_grad():
        torch.onnx.export(head, (torch.randn(1, 100, head.inp.in_channels - 96), torch.randn(1, 200, head.mean.numel())),
                          str(path), input_names=["frames", "logmel"], output_names=["logp"], opset_version=OPSET,
                          dynamic_axes={"frames": {1: "time2"}, "logmel": {1: "time"}, "logp": {1: "time2"}}, dynamo=False)
    card_path = models_dir / "card.json"
    card = json.loads(card_path.read_text(encoding="utf-8"))
    card["files"]["letters"] = {"path": path.name, "sha256": file_sha256(path)}
    card["letters"] = {"alphabet": alphabet, "receptive_frames": head.receptive_frames, "blank": 0, "training": training}
    write_json(card, card_path)
    return card


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--corpora", type=Path, default=ROOT.parent / "shared" / "corpora",
                    help="the shared corpora: every transcribed one but the unseen language (exporters/corpus.py)")
    ap.add_argument("--no-augment", dest="augment", action="store_false", help="no VTLP, tilt or masks")
    ap.add_argument("--items", type=Path, default=None,
                    help="the item cache exporters.train wrote (runs/items2-*.pkl): reuse its features")
    ap.add_argument("--synth", type=Path, default=None)
    ap.add_argument("--models", type=Path, default=ROOT / "models", help="folder with the exported encoders; the head is added there")
    ap.add_argument("--minutes", type=float, default=25.0)
    ap.add_argument("--variants", type=int, default=2)
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--seed", type=int, default=3)
    a = ap.parse_args(argv)
    torch.manual_seed(a.seed)
    rng = random.Random(a.seed)
    torch.set_num_threads(2)
    t0 = time.time()
    models = Models(a.models)
    alphabet = alphabet_of(models.symbols)
    table = {c: i + 1 for i, c in enumerate(alphabet)}
    splits = corpus_splits(a.corpora, limit=24 if a.quick else None) if a.corpora.exists() else {}
    train_u = [u for parts in splits.values() for key in ("train", "letters") for u in parts.get(key, [])]
    dev_u = [u for parts in splits.values() for u in parts.get("dev", [])]
    if a.quick:
        a.variants, a.minutes = 1, 0.4
    synth = synthetic_utterances(a.synth) if a.synth else []
    if a.quick and not synth:
        synth = quick_synthetic(ROOT / "runs" / "quick-synth.pkl")
    if not dev_u:  # no corpus at hand: a few synthetic utterances stand in for the dev split
        dev_u, synth = synth[:6], synth[6:]
    if a.items is not None and a.items.exists():  # the encoders' cached items: only what they lack is built here
        import pickle

        with open(a.items, "rb") as f:
            cached, cached_dev = pickle.load(f)
        extra = [u for parts in splits.values() for u in parts.get("letters", [])]
        items = cached + build_items(extra, a.variants, a.seed)
        dev_items = [it for name, its in cached_dev.items() if not name.endswith("-radio") for it in its]
    else:
        items = build_items(train_u, a.variants, a.seed) + build_items(synth, 2, a.seed + 1)
        dev_items = build_items(dev_u, 1, 0)
    data = prepare(items, models, table)
    dev = prepare(dev_items, models, table)
    print(f"data: {len(data)} utterances, dev {len(dev)}, {time.time() - t0:.0f}s", flush=True)
    head = LetterHead(len(alphabet), frame_dim=models.card["frame_dim"])
    with torch.no_grad():
        mels = np.concatenate([sliding_mean_removed(torch.from_numpy(d["feats"][None].astype(np.float32)))[0, ::10].numpy()
                               for d in data[:2000]])
    head.mean.copy_(torch.from_numpy(mels.mean(0)))
    head.std.copy_(torch.from_numpy(mels.std(0) + 1e-3))
    opt = torch.optim.AdamW(head.parameters(), lr=2e-3, weight_decay=1e-4)
    before = letter_error_rate(head, dev)
    budget, t_train, step, history, best, best_state = a.minutes * 60, time.time(), 0, [], 9.0, None
    order = sorted(range(len(data)), key=lambda i: len(data[i]["frames"]))
    chunks = [order[i:i + 24] for i in range(0, len(order), 24)]  # similar lengths batched together
    warmup = 10 if a.quick else 100
    while time.time() - t_train < budget or (a.quick and step < 20):  # the quick run: a few steps even on a busy machine
        frac = min(1.0, (time.time() - t_train) / budget)
        for g in opt.param_groups:
            g["lr"] = 2e-3 * min(1.0, (step + 1) / warmup) * (0.05 + 0.95 * 0.5 * (1 + math.cos(math.pi * frac)))
        fr, lm, lens, tg, tl, mask = batch(data, rng.choice(chunks))
        if a.augment:  # the encoders' feature-domain perturbation, on the head's own view of the features
            lm = torch.from_numpy(np.stack([perturb(x, rng) for x in lm.numpy()]))
        lp = head(fr, lm, mask)
        loss = F.ctc_loss(lp.transpose(0, 1), tg, lens, tl, blank=0, zero_infinity=True)
        opt.zero_grad()
        loss.backward()
        torch.nn.utils.clip_grad_norm_(head.parameters(), 5.0)
        opt.step()
        step += 1
        if step % (20 if a.quick else 300) == 0:
            ler = letter_error_rate(head, dev)
            history.append({"step": step, "loss": round(loss.item(), 4), "dev_letter_error": round(ler, 4),
                            "minutes": round((time.time() - t_train) / 60, 1)})
            print(json.dumps(history[-1]), flush=True)
            if ler < best:
                best, best_state = ler, {k: v.clone() for k, v in head.state_dict().items()}
    if best_state is not None:
        head.load_state_dict(best_state)
    after = letter_error_rate(head, dev)
    card = export(head, a.models, alphabet, {
        "command": " ".join(["python", "-m", "exporters.train_letters"] + (argv if argv is not None else sys.argv[1:])),
        "steps": step, "wall_minutes": round((time.time() - t0) / 60, 1), "history": history,
        "train_utterances": len(data), "dev_utterances": len(dev), "synthetic_languages": sorted({u.lang for u in synth}),
        "corpora": sorted({u.lang for u in train_u}),
        "dev_letter_error_untrained": round(before, 4), "dev_letter_error": round(after, 4)})
    print(f"dev letter error {before:.3f} -> {after:.3f}; wrote {a.models / 'letter_head.onnx'}")
    return card


if __name__ == "__main__":
    main()
