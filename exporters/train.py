"""Train the acoustic and spelling encoders jointly (multi-view), then export them.

    python -m exporters.train --synth runs/synth.pkl --minutes 62 --variants 2 --out models
    python -m exporters.train --quick --out /tmp/m   # a minute: a handful of utterances

Losses (all in-batch, cosine similarities over a temperature):
- acoustic -> spelling and spelling -> acoustic contrastive terms (InfoNCE), with a
  cost-sensitive margin: a negative spelling at edit distance d is pushed away by a margin
  that grows with d (capped), so near-homophones are not forced apart as hard as unrelated words;
- acoustic <-> acoustic: tokens of the same type are positives (supervised contrastive);
- spelling <-> spelling: two spellings may be no more similar than their edit distance allows;
- non-word spans (half a word, a span across a word boundary, a pause, music) are negatives
  for every spelling and every token, with the full margin.
Hard negatives: one-edit corruptions of the batch's spellings (a letter swapped, dropped,
added, a mark removed). Spans are embedded exactly as search embeds them: frame encoder over
the whole utterance, pooling from prefix sums (detector/pooling.py), span head.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import pickle
import random
import shutil
import sys
import time
import unicodedata
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

import numpy as np
import torch
import torch.nn.functional as F

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from detector.features import log_mel  # noqa: E402
from detector.pooling import FRAME_SECONDS, MIN_FRAMES  # noqa: E402
from detector.spelling import symbols  # noqa: E402
from exporters import augment  # noqa: E402
from exporters.corpus import MAX_WORD_SECONDS, Utterance, corpus_splits, load_audio  # noqa: E402
from exporters.edit_distance import pairwise  # noqa: E402
from exporters.model import FrameEncoder, SpanHead, SpellingEncoder, pool, sliding_mean_removed  # noqa: E402

SILENCE = math.log(1e-6)  # the feature value of digital silence, used to pad batches
MARGIN, MARGIN_EDITS, TAU = 0.2, 4, 0.1


# ---------------------------------------------------------------- data

def make_item(u: Utterance, variant: int, seed: int, pool: str = "train") -> dict:
    """Features of one utterance: variant 0 clean, any other through a random archive channel."""
    x = load_audio(u)
    f, lead = 1.0, 0.0
    if variant > 0:
        x, f, lead = augment.radio_chain(x, np.random.default_rng(seed), **augment.channel_sources(pool, ROOT / "runs" / "music"))
    feats = log_mel(x)
    words = [(lead + s / f, lead + e / f, w) for s, e, w in u.words]
    return {"id": u.id, "speaker": u.speaker, "lang": u.lang, "feats": feats.astype(np.float16),
            "words": words, "lead": lead, "transcript": u.transcript}


def _make(args):
    return make_item(*args)


def build_items(utts: list[Utterance], variants: int, seed: int, workers: int = 2, first: int = 0,
                pool: str = "train") -> list[dict]:
    """Items of every utterance in variants first..variants-1 (0 is clean)."""
    jobs = [(u, v, seed * 100003 + i * 7 + v, pool) for i, u in enumerate(utts) for v in range(first, variants)]
    if workers > 1 and len(jobs) > 50:
        with ProcessPoolExecutor(workers) as ex:
            return list(ex.map(_make, jobs, chunksize=16))
    return [_make(j) for j in jobs]


def synthetic_utterances(path: Path) -> list[Utterance]:
    with open(path, "rb") as f:
        raw = pickle.load(f)
    return [Utterance(r["id"], r["speaker"], " ".join(w for _, _, w in r["words"]), None,
                      [(s, e, unicodedata.normalize("NFC", w.lower())) for s, e, w in r["words"]],
                      lang=r["lang"], audio=r["audio"].astype(np.float32) / 32767) for r in raw]


def inventory(types: list[str]) -> list[str]:
    syms = set("abcdefghijklmnopqrstuvwxyz '-")
    for t in types:
        syms.update(symbols(t))
    return ["<pad>", "<unk>"] + sorted(syms)


# ---------------------------------------------------------------- feature-domain augmentation

def _mel_centres() -> np.ndarray:
    import librosa

    from detector.features import FEATURE_PARAMS as P

    return librosa.mel_frequencies(P["n_mels"] + 2, fmin=P["fmin"], fmax=P["fmax"], htk=False)[1:-1]


MEL_HZ = _mel_centres()


def vtlp(feats: np.ndarray, alpha: float) -> np.ndarray:
    """Vocal tract length perturbation on log-mel frames (Jaitly & Hinton, 2013): the spectrum
    is read at frequency f / alpha, i.e. interpolated between the bands' centre frequencies."""
    src = np.interp(MEL_HZ / alpha, MEL_HZ, np.arange(len(MEL_HZ)))
    lo = np.floor(src).astype(int).clip(0, len(MEL_HZ) - 1)
    hi = np.minimum(lo + 1, len(MEL_HZ) - 1)
    w = (src - lo).astype(np.float32)
    return feats[:, lo] * (1 - w) + feats[:, hi] * w


def spec_augment(feats: np.ndarray, rng: random.Random, bands: int = 2, width: int = 5, times: int = 2,
                 span: int = 6) -> np.ndarray:
    """SpecAugment-style masks (Park et al., Interspeech 2019): a few bands and short stretches
    set to the utterance's mean, short enough never to hide a whole word."""
    y = feats.copy()
    fill = y.mean()
    for _ in range(bands):
        w = rng.randint(0, width)
        b = rng.randint(0, y.shape[1] - w)
        y[:, b:b + w] = fill
    for _ in range(times):
        w = rng.randint(0, span)
        t = rng.randint(0, max(0, y.shape[0] - w))
        y[t:t + w] = fill
    return y


def perturb(feats: np.ndarray, rng: random.Random) -> np.ndarray:
    """Per-utterance speaker and channel perturbation of log-mel frames: VTLP (alpha 0.88-1.12),
    a spectral tilt and gain (additive in the log domain), SpecAugment masks."""
    y = vtlp(feats, rng.uniform(0.88, 1.12))
    tilt = np.linspace(-1, 1, y.shape[1], dtype=np.float32) * rng.uniform(-1.5, 1.5)
    y = y + tilt + rng.uniform(-2, 2)
    return spec_augment(y, rng)


# ---------------------------------------------------------------- spans

def word_frames(item) -> list[tuple[int, int, str]]:
    out = []
    for s, e, w in item["words"]:
        if e - s > MAX_WORD_SECONDS or e - s < 0.06:
            continue
        out.append((int(round(s / FRAME_SECONDS)), int(round(e / FRAME_SECONDS)), w))
    return out


def nonword_spans(item, rng: random.Random, k: int = 4) -> list[tuple[int, int]]:
    """Spans search must reject: part of a word, two half words, a pause, music before speech."""
    wf = word_frames(item)
    n = (item["feats"].shape[0] + 1) // 2
    out = []
    for _ in range(k):
        kind = rng.random()
        if wf and kind < 0.35:  # 30-60 % of one word
            a, b, _ = rng.choice(wf)
            if b - a >= 10:
                L = max(MIN_FRAMES, int((b - a) * rng.uniform(0.3, 0.6)))
                s = rng.choice([a, b - L, a + (b - a - L) // 2])
                out.append((s, s + L))
        elif len(wf) > 1 and kind < 0.7:  # across a word boundary
            i = rng.randrange(len(wf) - 1)
            (a1, b1, _), (a2, b2, _) = wf[i], wf[i + 1]
            s = a1 + int((b1 - a1) * rng.uniform(0.3, 0.7))
            e = a2 + int((b2 - a2) * rng.uniform(0.3, 0.7))
            if e - s >= MIN_FRAMES:
                out.append((s, e))
        else:  # silence or music: before the first word / after the last
            first = wf[0][0] if wf else n
            last = wf[-1][1] if wf else 0
            if first >= 8:
                L = min(first - 2, rng.randint(8, 40))
                out.append((max(0, first - 2 - L), first - 2))
            elif n - last >= 10:
                out.append((last + 2, min(n, last + 2 + rng.randint(8, 40))))
    return [(a, b) for a, b in out if 0 <= a and b <= n and b - a >= MIN_FRAMES]


def corrupt(sym: list[str], letters: list[str], rng: random.Random) -> list[str]:
    s = list(sym)
    marks = [i for i, c in enumerate(s) if unicodedata.combining(c)]
    r = rng.random()
    if marks and r < 0.15:
        del s[rng.choice(marks)]
    elif r < 0.55 and s:
        s[rng.randrange(len(s))] = rng.choice(letters)
    elif r < 0.8 and len(s) > 3:
        del s[rng.randrange(len(s))]
    else:
        s.insert(rng.randrange(len(s) + 1), rng.choice(letters))
    return s


def drop_marks(sym: list[str]) -> list[str]:
    return [c for c in sym if not unicodedata.combining(c)]


# ---------------------------------------------------------------- model wrapper

class Model(torch.nn.Module):
    def __init__(self, n_symbols, channels=128, frame_dim=128, dim=64):
        super().__init__()
        self.frames = FrameEncoder(channels=channels, out_dim=frame_dim)
        self.head = SpanHead(frame_dim=frame_dim, dim=dim)
        self.spell = SpellingEncoder(n_symbols, dim=dim)

    def embed_spans(self, feats_list, spans_list):
        """feats_list: list of (T, 40) float arrays; spans_list: list of (a, b) frame arrays."""
        T = max(f.shape[0] for f in feats_list)
        batch = np.full((len(feats_list), T, feats_list[0].shape[1]), SILENCE, np.float32)
        mask = np.zeros((len(feats_list), T), np.float32)
        for i, f in enumerate(feats_list):
            batch[i, : f.shape[0]] = f
            mask[i, : f.shape[0]] = 1
        out = self.frames(torch.from_numpy(batch), torch.from_numpy(mask))
        pooled = []
        for i, (f, spans) in enumerate(zip(feats_list, spans_list)):
            n = (f.shape[0] + 1) // 2
            fr = out[i, :n]
            prefix = torch.cat([torch.zeros(1, fr.shape[1]), torch.cumsum(fr, 0)])
            a = torch.tensor([s[0] for s in spans], dtype=torch.long).clamp(0, n - MIN_FRAMES)
            b = torch.maximum(torch.tensor([s[1] for s in spans], dtype=torch.long).clamp(max=n), a + MIN_FRAMES)
            pooled.append(pool(fr, prefix, a, b))
        return self.head(torch.cat(pooled))

    def embed_spellings(self, sym_lists, table):
        ids = [[table.get(c, 1) for c in s] or [1] for s in sym_lists]
        L = max(len(i) for i in ids)
        x = torch.zeros(len(ids), L, dtype=torch.long)
        for k, i in enumerate(ids):
            x[k, : len(i)] = torch.tensor(i)
        return self.spell(x, torch.tensor([len(i) for i in ids]))


# ---------------------------------------------------------------- batches

GROUP_WEIGHTS = {"mboshi": 0.35, "arabic-commands": 0.18, "arabic-emotions": 0.07}  # the rest: synthetic, shared equally


class Sampler:
    """Speaker-balanced batches with cross-speaker positives.

    A batch takes word types from each group (a corpus, or one synthetic language) in fixed
    shares; for each type, two tokens spoken by different speakers where the type has more
    than one speaker (else two different utterances), each speaker drawn first and then one
    of their tokens, so a talkative speaker is no more likely than a quiet one. The acoustic
    pair is then a cross-speaker positive.
    """

    def __init__(self, items, rng: random.Random):
        self.items, self.rng = items, rng
        self.by_type: dict[str, dict[str, list[int]]] = {}  # type -> speaker -> item indices
        group_of: dict[str, str] = {}
        for i, it in enumerate(items):
            for _, _, w in word_frames(it):
                self.by_type.setdefault(w, {}).setdefault(it["speaker"], []).append(i)
                group_of.setdefault(w, it["lang"])
        multi = [t for t, v in self.by_type.items() if len({items[i]["id"] for s in v.values() for i in s}) >= 2]
        self.groups: dict[str, list[str]] = {}
        for t in multi:
            self.groups.setdefault(group_of[t], []).append(t)
        synth = [g for g in self.groups if g not in GROUP_WEIGHTS]
        w = {g: GROUP_WEIGHTS[g] for g in self.groups if g in GROUP_WEIGHTS}
        rest = max(0.0, 1.0 - sum(w.values()))
        w.update({g: rest / len(synth) for g in synth})
        self.names = sorted(self.groups)
        self.weights = [w[g] or 1e-9 for g in self.names]
        self.multi = multi
        self.by_group_items: dict[str, list[int]] = {}
        for i, it in enumerate(items):
            self.by_group_items.setdefault(it["lang"], []).append(i)

    def pair(self, t: str) -> tuple[int, int]:
        speakers = self.by_type[t]
        names = list(speakers)
        if len(names) >= 2:
            s1, s2 = self.rng.sample(names, 2)
            return self.rng.choice(speakers[s1]), self.rng.choice(speakers[s2])
        opts = speakers[names[0]]
        first = self.rng.choice(opts)
        others = [i for i in opts if self.items[i]["id"] != self.items[first]["id"]] or opts
        return first, self.rng.choice(others)

    def batch(self, n_pairs=18, n_random=10):
        chosen: list = []
        seen: set[str] = set()
        for _ in range(min(n_pairs, len(self.multi))):
            g = self.rng.choices(self.names, self.weights)[0]
            t = self.rng.choice(self.groups[g])
            if t in seen:
                continue
            seen.add(t)
            a, b = self.pair(t)
            chosen += [(a, t), (b, t)]
        groups = list(self.by_group_items)
        for _ in range(min(n_random, len(self.items))):
            chosen.append((self.rng.choice(self.by_group_items[self.rng.choice(groups)]), None))
        return chosen


def margins(ed: np.ndarray) -> torch.Tensor:
    return torch.from_numpy(MARGIN * np.minimum(ed, MARGIN_EDITS) / MARGIN_EDITS).float()


CROP = 320  # feature frames (3.2 s) per utterance in a training batch
EDGE = 16  # encoder frames kept clear of an artificial crop edge (the receptive field)


def crop(item, target: str | None, rng: random.Random):
    """A training excerpt of at most CROP frames around `target`, with the words wholly inside it.

    Words within EDGE encoder frames of an artificial cut are dropped, so every span in a batch
    sees the same context it would see in a whole broadcast.
    """
    feats = item["feats"]
    T = feats.shape[0]
    wf = word_frames(item)
    if T <= CROP:
        return feats, wf, item
    picks = [w for w in wf if w[2] == target] or wf
    if not picks:  # no usable word in a long utterance: any excerpt (its non-word spans still teach)
        s0 = rng.randint(0, (T - CROP) // 2) * 2
        return feats[s0:s0 + CROP], [], {"feats": feats[s0:s0 + CROP], "words": []}
    a, b, _ = rng.choice(picks)
    lo = max(0, 2 * b - CROP + 2 * EDGE)
    hi = min(T - CROP, 2 * a - 2 * EDGE)
    s0 = rng.randint(min(lo, max(0, hi)), max(lo, max(0, hi))) // 2 * 2
    s0 = min(max(0, s0), (T - CROP) // 2 * 2)
    f0, f1 = s0 // 2, (s0 + CROP) // 2
    left = EDGE if s0 > 0 else 0
    right = EDGE if s0 + CROP < T else 0
    kept = [(x - f0, y - f0, w) for x, y, w in wf if x >= f0 + left and y <= f1 - right]
    sub = {"feats": feats[s0:s0 + CROP], "words": [((x) * FRAME_SECONDS, (y) * FRAME_SECONDS, w) for x, y, w in kept]}
    return feats[s0:s0 + CROP], kept, sub


def step_loss(model, items, idx, table, letters, rng: random.Random, augment_features: bool = True):
    feats, spans, tok_types, n_tok = [], [], [], []
    for i, target in idx:
        f, wf, sub = crop(items[i], target, rng)
        if augment_features:
            f = perturb(f.astype(np.float32), rng)
        jit = [(a + rng.randint(-1, 1), b + rng.randint(-1, 1), w) for a, b, w in wf]
        nw = nonword_spans(sub, rng)
        if not jit and not nw:
            continue
        feats.append(f.astype(np.float32))
        spans.append([(a, b) for a, b, _ in jit] + nw)
        tok_types += [w for _, _, w in jit]
        n_tok.append((len(jit), len(nw)))
    emb = model.embed_spans(feats, spans)
    is_tok = torch.tensor(sum([[True] * t + [False] * k for t, k in n_tok], []))
    A, N = emb[is_tok], emb[~is_tok]
    types = sorted(set(tok_types))
    tix = {t: k for k, t in enumerate(types)}
    y = torch.tensor([tix[t] for t in tok_types])
    # spellings: batch types (some with marks dropped), plus one-edit corruptions as hard negatives
    sym = [symbols(t) for t in types]
    sym = [drop_marks(s) if rng.random() < 0.3 else s for s in sym]
    extra = [corrupt(rng.choice(sym), letters, rng) for _ in range(max(8, len(sym) // 4))]
    extra = [e for e in extra if e and e not in sym]
    allsym = sym + extra
    S = model.embed_spellings(allsym, table)
    ed = pairwise(sym, allsym)
    M = margins(ed)  # (types, all spellings): 0 for the own type
    # acoustic -> spelling
    l_as = F.cross_entropy((A @ S.T + M[y]) / TAU, y)
    # spelling -> acoustic (multi-positive), non-words get the full margin
    St = S[: len(types)]
    logits = torch.cat([St @ A.T + M[:, : len(types)][:, y], St @ N.T + MARGIN], dim=1) / TAU
    pos = torch.cat([(y[None, :] == torch.arange(len(types))[:, None]), torch.zeros(len(types), len(N), dtype=torch.bool)], 1)
    l_sa = (torch.logsumexp(logits, 1) - torch.logsumexp(logits.masked_fill(~pos, -1e9), 1)).mean()
    # acoustic <-> acoustic
    same = (y[:, None] == y[None, :]) & ~torch.eye(len(y), dtype=torch.bool)
    has = same.any(1)
    l_aa = torch.tensor(0.0)
    if has.any():
        tt = margins(ed[:, : len(types)][y.numpy()][:, y.numpy()])
        la = torch.cat([A @ A.T + tt, A @ N.T + MARGIN], 1) / TAU
        la = la.masked_fill(torch.cat([torch.eye(len(y), dtype=torch.bool), torch.zeros(len(y), len(N), dtype=torch.bool)], 1), -1e9)
        posm = torch.cat([same, torch.zeros(len(y), len(N), dtype=torch.bool)], 1)
        l_aa = (torch.logsumexp(la[has], 1) - torch.logsumexp(la[has].masked_fill(~posm[has], -1e9), 1)).mean()
    # spelling <-> spelling: similarity bounded by edit distance
    cap = 1.0 - torch.from_numpy(np.minimum(ed[:, : len(types)], MARGIN_EDITS) / MARGIN_EDITS).float()
    off = ~torch.eye(len(types), dtype=torch.bool)
    l_ss = F.relu(St @ St.T - cap)[off].mean() if len(types) > 1 else torch.tensor(0.0)
    loss = l_as + l_sa + 0.5 * l_aa + 0.5 * l_ss
    return loss, {"as": l_as.item(), "sa": l_sa.item(), "aa": float(l_aa), "ss": float(l_ss)}


# ---------------------------------------------------------------- validation

def average_precision(scores: np.ndarray, labels: np.ndarray) -> float:
    order = np.argsort(-scores, kind="mergesort")
    s, l = scores[order], labels[order].astype(np.float64)
    tp = np.cumsum(l)
    last = np.r_[np.nonzero(np.diff(s))[0], len(s) - 1]  # last index of each distinct score
    prec = tp[last] / (last + 1)
    rec_gain = np.diff(np.r_[0, tp[last]])
    return float((prec * rec_gain).sum() / max(1, l.sum()))


@torch.no_grad()
def validate(model, items, table, min_letters=5, limit=1500):
    model.eval()
    feats, spans, types = [], [], []
    for it in items:
        wf = [(a, b, w) for a, b, w in word_frames(it) if len(drop_marks(symbols(w))) >= min_letters]
        if wf:
            feats.append(it["feats"].astype(np.float32))
            spans.append([(a, b) for a, b, _ in wf])
            types += [w for *_, w in wf]
        if len(types) >= limit:
            break
    if len(types) < 2:  # no pair to rank: nothing measured
        model.train()
        return {"acoustic_ap": 0.0, "crossview_ap": 0.0, "tokens": len(types)}
    A = torch.cat([model.embed_spans(feats[i:i + 32], spans[i:i + 32]) for i in range(0, len(feats), 32)]).numpy()
    uniq = sorted(set(types))
    S = model.embed_spellings([symbols(t) for t in uniq], table).numpy()
    y = np.array([uniq.index(t) for t in types])
    iu = np.triu_indices(len(y), 1)
    ap_aa = average_precision((A @ A.T)[iu], (y[:, None] == y[None, :])[iu])
    ap_as = average_precision((A @ S.T).ravel(), (y[:, None] == np.arange(len(uniq))[None, :]).ravel())
    model.train()
    return {"acoustic_ap": ap_aa, "crossview_ap": ap_as, "tokens": len(y)}


def validate_groups(model, dev: dict, table, limit=800) -> dict:
    """validate() on each dev group (tokens of at least 4 letters); 'score' is the mean over
    groups of acoustic + cross-view AP, the model-selection criterion."""
    out, scores = {}, []
    for name, items in dev.items():
        v = validate(model, items, table, min_letters=4, limit=limit)
        out[name] = {k: round(x, 4) if isinstance(x, float) else x for k, x in v.items()}
        if v["tokens"] >= 2:
            scores.append(v["acoustic_ap"] + v["crossview_ap"])
    out["score"] = float(np.mean(scores)) if scores else 0.0
    return out


def quick_synthetic(path: Path) -> list[Utterance]:
    """A handful of espeak-ng utterances (two languages, 24 pseudo-words) for the quick run
    when no corpus is at hand."""
    if not path.exists():
        from exporters import synth

        if shutil.which("espeak-ng") is None:
            return []
        synth.build(ROOT, 12, 2, 3, path, languages=["es", "de"])
    return synthetic_utterances(path)


# ---------------------------------------------------------------- main

def save(obj, path: Path):
    tmp = path.with_suffix(".tmp")
    torch.save(obj, tmp)
    os.replace(tmp, path)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--corpora", type=Path, default=ROOT.parent / "shared" / "corpora",
                    help="the shared corpora (exporters/corpus.py CORPUS_ROLES says how each is used)")
    ap.add_argument("--synth", type=Path, default=None, help="synthetic speech from exporters/synth.py")
    ap.add_argument("--out", type=Path, default=ROOT / "models")
    ap.add_argument("--work", type=Path, default=ROOT / "runs")
    ap.add_argument("--minutes", type=float, default=62.0, help="training time budget (minutes)")
    ap.add_argument("--variants", type=int, default=2, help="copies of each corpus utterance: clean + augmented")
    ap.add_argument("--quick", action="store_true", help="a handful of utterances, about a minute")
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--resume", action="store_true")
    a = ap.parse_args(argv)
    torch.manual_seed(a.seed)
    rng = random.Random(a.seed)
    torch.set_num_threads(2)
    a.work.mkdir(parents=True, exist_ok=True)
    t0 = time.time()
    splits = corpus_splits(a.corpora, limit=24 if a.quick else None) if a.corpora.exists() else {}
    train_u = [u for parts in splits.values() for u in parts.get("train", [])]
    dev_u = {name: parts["dev"] for name, parts in splits.items() if parts.get("dev")}
    held_n = sum(len(parts.get("held", [])) for parts in splits.values())
    if a.quick:
        a.variants, a.minutes = 2, 0.6
    synth = synthetic_utterances(a.synth) if a.synth else []
    if a.quick and not synth:  # no synthetic speech given: a few utterances made here (espeak-ng)
        synth = quick_synthetic(a.work / "quick-synth.pkl")
    if not train_u and not synth:
        raise SystemExit("no training data: neither ../shared/corpora nor --synth, and espeak-ng is missing")
    cache = a.work / ("items-quick.pkl" if a.quick else f"items2-v{a.variants}-{len(train_u)}-{len(synth)}.pkl")
    if cache.exists() and not a.quick:
        items, dev = pickle.load(open(cache, "rb"))
    else:
        items = build_items(train_u, a.variants, a.seed) + build_items(synth, 2, a.seed + 1)
        dev = {name: build_items(us, 1, 0) for name, us in dev_u.items()}
        if "mboshi" in dev_u:  # the seen voices through a (training-pool) archive channel
            dev["mboshi-radio"] = build_items(dev_u["mboshi"], 2, 5, first=1)
        if not dev:
            dev = {"synthetic": build_items(synth[::10][:8], 1, 0)}  # every tenth utterance: deterministic
        if not a.quick:
            pickle.dump((items, dev), open(cache, "wb"))
    print(f"data: {len(items)} items, dev {sum(map(len, dev.values()))} in {time.time() - t0:.0f}s", flush=True)
    all_types = sorted({w for it in items for *_, w in it["words"]})
    inv = inventory(all_types)
    table = {c: i for i, c in enumerate(inv)}
    letters = [c for c in inv[2:] if c.isalpha()]
    model = Model(len(inv))
    with torch.no_grad():
        feats = np.concatenate([sliding_mean_removed(torch.from_numpy(it["feats"][None].astype(np.float32)))[0, ::10].numpy()
                                for it in rng.sample(items, min(2000, len(items)))])
    model.frames.mean.copy_(torch.from_numpy(feats.mean(0)))
    model.frames.std.copy_(torch.from_numpy(feats.std(0) + 1e-3))
    opt = torch.optim.AdamW(model.parameters(), lr=2e-3, weight_decay=1e-4)
    ckpt = a.work / ("quick.pt" if a.quick else "last.pt")
    step, best, history = 0, -1.0, []
    if a.resume and ckpt.exists():
        st = torch.load(ckpt, weights_only=False)
        model.load_state_dict(st["model"]), opt.load_state_dict(st["opt"])
        step, best, history = st["step"], st["best"], st["history"]
    sampler = Sampler(items, rng)
    probe = sampler.batch(n_pairs=6, n_random=4)  # a fixed batch: its loss before and after training

    def probe_loss():
        with torch.no_grad():
            model.eval()
            value = step_loss(model, items, probe, table, letters, random.Random(0), augment_features=False)[0].item()
            model.train()
        return value

    probe_before = probe_loss()
    budget = a.minutes * 60
    t_train = time.time()
    losses = []
    eval_every = 20 if a.quick else 250
    warmup = 10 if a.quick else 200
    while time.time() - t_train < budget or (a.quick and step < 16):  # the quick run: a few steps even on a busy machine
        frac = min(1.0, (time.time() - t_train) / budget)
        for g in opt.param_groups:  # warm-up then cosine decay over the time budget
            g["lr"] = 2e-3 * min(1.0, (step + 1) / warmup) * (0.05 + 0.95 * 0.5 * (1 + math.cos(math.pi * frac)))
        idx = sampler.batch(n_pairs=6 if a.quick else 18, n_random=4 if a.quick else 10)
        loss, parts = step_loss(model, items, idx, table, letters, rng)
        opt.zero_grad()
        loss.backward()
        torch.nn.utils.clip_grad_norm_(model.parameters(), 5.0)
        opt.step()
        losses.append(loss.item())
        step += 1
        if step % eval_every == 0:
            v = validate_groups(model, dev, table, limit=300 if a.quick else 800)
            history.append({"step": step, "loss": float(np.mean(losses[-eval_every:])), **v,
                            "minutes": (time.time() - t_train) / 60})
            print(json.dumps(history[-1]), flush=True)
            state = {"model": model.state_dict(), "opt": opt.state_dict(), "step": step, "best": best,
                     "history": history, "inventory": inv}
            score = v["score"]
            if score > best:
                best = state["best"] = score
                save(state, a.work / ("quick-best.pt" if a.quick else "best.pt"))
            save(state, ckpt)
    if not history or history[-1]["step"] != step:
        v = validate_groups(model, dev, table, limit=300 if a.quick else 800)
        history.append({"step": step, "loss": float(np.mean(losses[-20:])), **v, "minutes": (time.time() - t_train) / 60})
        print(json.dumps(history[-1]), flush=True)
    wall = (time.time() - t0) / 60
    best_path = a.work / ("quick-best.pt" if a.quick else "best.pt")
    final = {"model": model.state_dict(), "step": step, "history": history, "inventory": inv, "losses": losses,
             "probe_loss": (probe_before, probe_loss())}
    if best_path.exists() and not a.quick:
        final["model"] = torch.load(best_path, weights_only=False)["model"]
    from exporters.export_onnx import export

    final["card"] = export(model_from_state(final), inv, a.out, {
        "command": " ".join(["python", "-m", "exporters.train"] + (argv if argv is not None else sys.argv[1:])),
        "wall_minutes": round(wall, 1), "steps": step, "history": history,
        "train_utterances": len(train_u), "dev_utterances": sum(map(len, dev_u.values())), "heldout_utterances": held_n,
        "synthetic_utterances": len(synth), "variants": a.variants,
        "synthetic_languages": sorted({u.lang for u in synth}),
        "synthetic_voices": sorted({u.speaker.split("+")[0] for u in synth}),
        "corpora": {name: {part: {"utterances": len(us), "speakers": len({u.speaker for u in us})}
                           for part, us in parts.items()} for name, parts in splits.items()},
    })
    return final


def model_from_state(state) -> Model:
    m = Model(len(state["inventory"]))
    m.load_state_dict(state["model"])
    m.eval()
    return m


if __name__ == "__main__":
    main()
