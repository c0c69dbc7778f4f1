"""Write models/MODEL_CARD.md from models/card.json (the benchmark sections are kept as they are).

    python -m exporters.model_card [--models models]
"""

from __future__ import annotations

import argparse
import json
import re
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

# Every corpus a model may be trained or measured on, with its source and terms (from each
# corpus folder's README in ../shared/corpora).
CORPUS_LICENCES = {
    "mboshi": "Godard et al., LREC 2018 (Mboshi-French parallel corpus): research corpus, credited, not redistributed",
    "arabic-commands": "Arabic Speech Commands dataset (Ghandoura et al., 2021): CC BY 4.0, credited here",
    "arabic-emotions": "Basic Arabic Vocal Emotions Dataset (BAVED): no licence text; research use, credited, not redistributed",
    "swahili-read": "Swahili-Speech (CateGitau, GitHub): MIT licence",
    "english-digits": "Free Spoken Digit Dataset: no licence file; research use, credited (measurement only, never trained on)",
    "urdu-broadcast": "URDU emotional speech dataset (Latif et al., 2018): research use only, credited, not redistributed "
                      "(measurement only: the unseen channel's babble)",
}
# Synthetic voices by engine; MBROLA voice ids name their diphone database.
ESPEAK = "espeak-ng formant voice (GPL-3.0-or-later; no recorded person)"
PICO = "SVOX pico (Debian libttspico, Apache-2.0): voice recorded from a real person; shipping allowed"
MBROLA = ("MBROLA diphone database {db} (Debian mbrola-{db}, non-free): voice recorded from a real person; free use "
          "and distribution when no charge is made, not to be sold or built into a product that is sold without the "
          "database author's permission; this model is shipped free of charge")


def voice_licence(voice: str) -> str:
    """The licence line of one synthetic voice id as exporters/synth.py names it."""
    if voice.startswith("pico:"):
        return PICO
    if voice.startswith("mb-"):
        return MBROLA.format(db=voice[3:])
    return ESPEAK


def licence_lines(training: dict) -> list[str]:
    """A table of every corpus the model saw or was measured on and every synthetic voice, with its terms."""
    lines = ["## Data and licences", "", "| source | used for | terms |", "|---|---|---|"]
    for name, parts in training.get("corpora", {}).items():
        used = ", ".join(f"{k} {v['utterances']} utt. / {v['speakers']} spk." for k, v in parts.items())
        lines.append(f"| corpus `{name}` | {used} | {CORPUS_LICENCES.get(name, 'UNKNOWN: check before shipping')} |")
    for voice in training.get("synthetic_voices", []):
        lines.append(f"| voice `{voice}` | synthetic training speech | {voice_licence(voice)} |")
    return lines + [""]


def render(card: dict) -> str:
    f = card["features"]
    t = card.get("training", {})
    hist = t.get("history", [])
    last = hist[-1] if hist else {}
    best = max(hist, key=selection_score) if hist else {}
    lines = [
        "# Trawl model card",
        "",
        f"Model `{card['name']}`, exported {card['created']} (ONNX opset 17): three files, run with onnxruntime on a CPU.",
        "",
        "| file | role | sha256 |",
        "|---|---|---|",
    ]
    roles = {"frames": "frame encoder: log-mel frames -> 20 ms frame vectors (convolutional, bounded context)",
             "head": "span head: pooled span descriptor -> unit vector",
             "spelling": "spelling encoder: NFD symbols -> unit vector",
             "letters": "letter head: frame vectors + log-mel -> per-frame letter log-probabilities (CTC, blank first)"}
    for k, v in card["files"].items():
        lines.append(f"| `{v['path']}` | {roles.get(k, k)} | `{v['sha256'][:16]}…` |")
    lines += [
        "",
        "## Features (the runtime refuses a card that disagrees)",
        f"- {f['sample_rate']} Hz mono; {f['n_mels']} mel bands ({f['mel_scale']}, {f['fmin']:.0f}–{f['fmax']:.0f} Hz); "
        f"{f['window']} window of {f['win_length']} samples, FFT {f['n_fft']}, hop {f['hop_length']} samples (10 ms); "
        f"natural log with floor {f['log_floor']}; {f['center']}; normalisation: {f['normalisation']}.",
        f"- Frame encoder output every {card['frame_seconds'] * 1000:.0f} ms, {card['frame_dim']} dims; each frame sees "
        f"±{card['receptive_frames']} frames ({card['receptive_frames'] * card['frame_seconds']:.2f} s) of context.",
        f"- Embedding size {card['embedding_dim']}; symbol inventory of {len(card['symbols'])} symbols "
        "(NFD letters and combining marks, space, apostrophe, hyphen; unknown symbols map to `<unk>`).",
        "- Index windows (duration s, hop s): " + ", ".join(f"({d}, {h})" for d, h in card["windows"]) + ".",
        "",
        "## Training",
        f"- Data: {card['provenance']}",
        "- Split (exporters/corpus.py, CORPUS_ROLES): Mboshi by transcript (its two speakers are the seen voices; "
        "repeated sentences never straddle the split); the Arabic corpora by speaker (dev and held-out speakers are never "
        "heard in training); English digits never trained on (the unseen language); Urdu television excerpts never trained "
        f"on (the unseen channel's babble). {t.get('heldout_utterances', '?')} held-out utterances never used in training or "
        f"model selection; {t.get('dev_utterances', '?')} dev utterances for checkpoint selection; "
        f"{t.get('train_utterances', '?')} training utterances in {t.get('variants', '?')} copies (clean + an archive channel: "
        "speed 0.9–1.1, room reverberation, real music (most wesnoth-1.16-music tracks) or synthetic beds, coloured noise, "
        "mains hum and crackle at 5–35 dB SNR, telephone/AM band, Vorbis/Opus/low-bitrate Opus/GSM round trips, gain). "
        "Held back as the unseen channel: eight music tracks, the Urdu babble, codec2.",
        f"- Synthetic: {t.get('synthetic_utterances', 0)} utterances of pseudo-words in "
        f"{', '.join(t.get('synthetic_languages', [])) or 'no'} spelling rules, spoken by espeak-ng and by voices recorded "
        "from real people (MBROLA diphone voices through espeak-ng, SVOX pico); demo and corpus words excluded.",
        "- Invariance: speaker-balanced batches with cross-speaker positive pairs (exporters/train.py, Sampler); VTLP "
        "(Jaitly & Hinton 2013), spectral tilt and gain, SpecAugment-style masks (Park et al. 2019) on the features; a "
        "bounded sliding mean removed from the features inside the encoders.",
        "- Losses: acoustic→spelling and spelling→acoustic InfoNCE with a cost-sensitive margin growing with edit distance "
        "(capped at 4 edits), acoustic–acoustic supervised contrastive, spelling–spelling similarity bounded by edit distance; "
        "non-word spans (part of a word, across a boundary, pause, music) as negatives; one-edit corrupted spellings as hard "
        "negatives; random removal of combining marks.",
        f"- Command: `{t.get('command', '')}`; wall time {t.get('wall_minutes', '?')} min on 2 CPU cores; {t.get('steps', '?')} steps.",
        f"- Dev AP (tokens of 4+ letters) at the selected checkpoint (step {best.get('step', '?')}): {dev_summary(best)} "
        f"(last: step {last.get('step', '?')}).",
        "",
    ] + letter_lines(card) + licence_lines(t) + [
        "## Terms",
        "The research corpora are credited above, not redistributed. Hits produced with these models are candidates "
        "to be verified by listening.",
        "",
    ]
    return "\n".join(lines)


def selection_score(h: dict) -> float:
    """A history row's model-selection score (older cards: one dev split's two APs)."""
    return h["score"] if "score" in h else h["acoustic_ap"] + h["crossview_ap"]


def dev_summary(h: dict) -> str:
    if "score" not in h:
        return f"acoustic {h.get('acoustic_ap', float('nan')):.3f}, cross-view {h.get('crossview_ap', float('nan')):.3f}"
    groups = {k: v for k, v in h.items() if isinstance(v, dict)}
    return "; ".join(f"{k}: acoustic {v['acoustic_ap']:.3f}, cross-view {v['crossview_ap']:.3f}" for k, v in groups.items())


def letter_lines(card: dict) -> list[str]:
    lt = card.get("letters")
    if not lt:
        return []
    t = lt.get("training", {})
    r = card.get("rescoring", {})
    lines = [
        "## Letter head and the second look in search",
        f"- Classes: CTC blank + {len(lt['alphabet'])} base letters ({' '.join(lt['alphabet'])}); marks are not "
        f"letters. Convolutional, ±{lt['receptive_frames']} frames beyond the frame encoder's context; the frame encoder "
        "is frozen, so the index's vectors do not change when the head is retrained.",
        f"- Trained with CTC (Graves et al., ICML 2006) on {t.get('train_utterances', '?')} utterances (the training "
        f"splits of {', '.join(t.get('corpora', [])) or 'the corpus'}, clean + augmented, and the synthetic speech in {', '.join(t.get('synthetic_languages', [])) or 'no'} "
        f"spelling rules): `{t.get('command', '')}`, {t.get('steps', '?')} steps, {t.get('wall_minutes', '?')} min. "
        f"Greedy letter error rate on the {t.get('dev_utterances', '?')} dev utterances: {t.get('dev_letter_error', float('nan')):.3f} "
        f"(untrained: {t.get('dev_letter_error_untrained', float('nan')):.2f}).",
        "- Indexing stores each broadcast's posteriors, one byte per class per 20 ms frame (0.1 nat steps). Search aligns "
        "a term's letters over each candidate's stretch (window ± 0.25 s) with a free start and end and ranks by "
        "embedding z-score + weight × alignment cost per letter (floored at −8), judged against the term's own background "
        "(detector/search.py; earlier releases normalised it per term by sum-to-one over the term's 200 best candidates, "
        "temperature tau, Mamou et al., Interspeech 2013).",
    ]
    bg = card.get("background")
    if bg:
        lines.append(f"- Posterior map over ({', '.join(bg.get('features', []))}): weights {bg['weights']}, intercept "
                     f"{bg['intercept']:g}, fitted by `{bg.get('command', '')}` on {bg.get('fitted_on', '')}; dev MTWV "
                     + ", ".join(f"{c}: " + ", ".join(f"{k} {v:.3f}" for k, v in m.items()) for c, m in bg.get("dev_mtwv", {}).items()) + ".")
    if r:
        lines.append(f"- Weight {r['weight']:g}, tau {r.get('tau', 1):g}, uncalibrated-confidence centre {r.get('centre', 0):g}, "
                     f"fitted by `{r.get('command', '')}` on {r.get('fitted_on', '')}; mean dev MTWV by (weight, tau): " + ", ".join(f"{w}: {(v['clean']['mtwv'] + v['radio']['mtwv']) / 2:.3f}" for w, v in r.get("grid", {}).items()) + ".")
    return lines + [""]


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--models", type=Path, default=ROOT / "models")
    a = ap.parse_args(argv)
    card = json.loads((a.models / "card.json").read_text(encoding="utf-8"))
    md = a.models / "MODEL_CARD.md"
    old = md.read_text(encoding="utf-8") if md.exists() else ""
    sections = [m.group(0) for m in re.finditer(r"<!-- (\w+):start -->.*?<!-- \1:end -->", old, flags=re.S)]
    md.write_text(render(card) + "\n" + "\n\n".join(sections) + ("\n" if sections else ""), encoding="utf-8")
    print(f"wrote {md} ({len(sections)} benchmark sections kept)")


if __name__ == "__main__":
    main()
