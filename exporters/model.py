"""The two encoders, in torch.

- FrameEncoder: log-mel frames -> 20 ms frame vectors. Convolutions only (dilated residual
  blocks, per-frame layer norm), so every output frame depends on a bounded stretch of audio
  (RECEPTIVE_SECONDS either side): running it once over a whole broadcast gives the same
  frames as running it over any excerpt with that much context.
- SpanHead: pooled span descriptor (detector/pooling.py) -> unit vector.
- SpellingEncoder: NFD symbol ids -> unit vector in the same space.
"""

from __future__ import annotations

import torch
import torch.nn as nn
import torch.nn.functional as F

DILATIONS = (1, 2, 4, 8, 1, 2, 4, 8)
NORM_HALF = 75  # log-mel frames (10 ms) either side in the sliding mean subtracted from every band


def sliding_mean_removed(feats, mask=None, half: int = NORM_HALF):
    """Log-mel frames minus each band's mean over the frames within `half` either side.

    A bounded-context cepstral-mean-style normalisation: a fixed channel colouring or gain
    (additive in the log domain) cancels, and each output frame still depends on a bounded
    stretch of audio. `mask` (B, T) marks real frames in a padded batch; beyond the ends of
    the signal the mean is over the frames that exist, in training and at run time alike.
    """
    x = feats.transpose(1, 2)  # (B, n_mels, T)
    m = torch.ones_like(x[:, :1]) if mask is None else mask[:, None, :].to(x.dtype)
    k = 2 * half + 1
    total = F.avg_pool1d(x * m, k, stride=1, padding=half, count_include_pad=True)
    count = F.avg_pool1d(m, k, stride=1, padding=half, count_include_pad=True)
    return (x - total / count.clamp_min(1.0 / k)).transpose(1, 2)


class ChannelNorm(nn.Module):
    """Layer norm over channels of each frame separately (never over time)."""

    def __init__(self, c):
        super().__init__()
        self.norm = nn.LayerNorm(c)

    def forward(self, x):  # (B, C, T)
        return self.norm(x.transpose(1, 2)).transpose(1, 2)


class Block(nn.Module):
    def __init__(self, c, d):
        super().__init__()
        self.conv = nn.Conv1d(c, c, 3, padding=d, dilation=d)
        self.norm = ChannelNorm(c)
        self.mix = nn.Conv1d(c, c, 1)

    def forward(self, x):
        return x + self.mix(F.relu(self.norm(self.conv(x))))


class FrameEncoder(nn.Module):
    def __init__(self, n_mels=40, channels=128, out_dim=128, dilations=DILATIONS):
        super().__init__()
        self.register_buffer("mean", torch.zeros(n_mels))
        self.register_buffer("std", torch.ones(n_mels))
        self.stem = nn.Conv1d(n_mels, channels, 5, stride=2, padding=2)
        self.blocks = nn.ModuleList(Block(channels, d) for d in dilations)
        self.out = nn.Conv1d(channels, out_dim, 1)
        # frames of 20 ms either side that one output frame can see (the sliding mean included)
        self.receptive_frames = 1 + sum(dilations) + (NORM_HALF + 1) // 2

    def forward(self, feats, mask=None):  # (B, T, n_mels) -> (B, ceil(T/2), out_dim)
        x = ((sliding_mean_removed(feats, mask) - self.mean) / self.std).transpose(1, 2)
        x = F.relu(self.stem(x))
        for b in self.blocks:
            x = b(x)
        return self.out(x).transpose(1, 2)


class SpanHead(nn.Module):
    def __init__(self, frame_dim=128, hidden=256, dim=64):
        super().__init__()
        self.net = nn.Sequential(nn.Linear(5 * frame_dim + 1, hidden), nn.ReLU(), nn.Linear(hidden, hidden),
                                 nn.ReLU(), nn.Linear(hidden, dim))

    def forward(self, pooled):
        return F.normalize(self.net(pooled), dim=-1)


class SpellingEncoder(nn.Module):
    def __init__(self, n_symbols, emb=64, hidden=128, dim=64):
        super().__init__()
        self.emb = nn.Embedding(n_symbols, emb, padding_idx=0)
        self.rnn = nn.GRU(emb, hidden, num_layers=2, bidirectional=True, batch_first=True)
        self.proj = nn.Sequential(nn.Linear(4 * hidden, 256), nn.ReLU(), nn.Linear(256, dim))

    def forward(self, ids, lengths=None):  # ids (B, L); lengths None means unpadded
        x = self.emb(ids)
        if lengths is not None:
            x = nn.utils.rnn.pack_padded_sequence(x, lengths.cpu(), batch_first=True, enforce_sorted=False)
            out, h = self.rnn(x)
            out, _ = nn.utils.rnn.pad_packed_sequence(out, batch_first=True)
            mask = (torch.arange(out.shape[1])[None, :] < lengths[:, None]).float()[..., None]
            mean = (out * mask).sum(1) / lengths[:, None].float()
        else:
            out, h = self.rnn(x)
            mean = out.mean(1)
        last = torch.cat([h[-2], h[-1]], dim=-1)
        return F.normalize(self.proj(torch.cat([last, mean], dim=-1)), dim=-1)


def pool(frames, prefix, a, b):
    """Torch mirror of detector.pooling.pool for one utterance: frames (T, H), prefix (T+1, H)."""
    n = b - a
    c1 = a + torch.div(n + 1, 3, rounding_mode="floor")
    c2 = a + torch.div(2 * n + 1, 3, rounding_mode="floor")

    def mean(lo, hi):
        return (prefix[hi] - prefix[lo]) / (hi - lo).unsqueeze(1).float()

    return torch.cat([mean(a, c1), mean(c1, c2), mean(c2, b), frames[a], frames[b - 1],
                      torch.log(n.float() * 0.02).unsqueeze(1)], dim=1)


class LetterHead(nn.Module):
    """Frame vectors (and the log-mel frames under them) -> per-frame letter log-probabilities (CTC).

    Reads the frame encoder's 20 ms outputs plus its own strided view of the log-mel features;
    convolutions only, so the output at a frame depends on a bounded stretch of audio and the
    head can run over a broadcast in chunks. Class 0 is the CTC blank.
    """

    def __init__(self, n_letters, n_mels=40, frame_dim=128, channels=256):
        super().__init__()
        self.register_buffer("mean", torch.zeros(n_mels))
        self.register_buffer("std", torch.ones(n_mels))
        self.mel = nn.Conv1d(n_mels, 96, 5, stride=2, padding=2)  # same length rule as the frame encoder's stem
        self.inp = nn.Conv1d(frame_dim + 96, channels, 5, padding=2)
        self.blocks = nn.ModuleList(Block(channels, d) for d in (2, 4))
        self.out = nn.Conv1d(channels, n_letters + 1, 1)
        # 20 ms frames either side, beyond the frame encoder's own (its sliding mean included)
        self.receptive_frames = 2 + 2 + 4 + 2 + (NORM_HALF + 1) // 2

    def forward(self, frames, logmel, mask=None):  # (B, T2, H), (B, T, n_mels) -> (B, T2, n_letters + 1)
        m = F.relu(self.mel(((sliding_mean_removed(logmel, mask) - self.mean) / self.std).transpose(1, 2)))
        x = F.relu(self.inp(torch.cat([frames.transpose(1, 2), m], dim=1)))
        for b in self.blocks:
            x = b(x)
        return F.log_softmax(self.out(x), dim=1).transpose(1, 2)
