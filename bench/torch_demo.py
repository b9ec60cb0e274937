"""Small PyTorch models built in code (random weights, nothing downloaded), to demo `eaves profile-torch`.

The scenario is our own: the (invented) Fennick Marsh field lab tags its observers' spoken notes
("heron, two, reed bed north") with a tiny on-device tagger, and sorts trail-camera thumbnails with
a tiny image spotter. Both run on the lab's CPU servers; eaves shows which layers waste the host.
"""

from __future__ import annotations

import torch
from torch import nn


class _TaggerBlock(nn.Module):
    """Pre-norm transformer block: self-attention and a feed-forward net, each with a residual."""

    def __init__(self, width: int, heads: int):
        super().__init__()
        self.norm1 = nn.LayerNorm(width)
        self.attend = nn.MultiheadAttention(width, heads, batch_first=True)
        self.norm2 = nn.LayerNorm(width)
        self.up = nn.Linear(width, 4 * width)
        self.act = nn.GELU()
        self.down = nn.Linear(4 * width, width)

    def forward(self, x):
        h = self.norm1(x)
        x = x + self.attend(h, h, h, need_weights=False)[0]
        return x + self.down(self.act(self.up(self.norm2(x))))


class _NoteGate(nn.Module):
    """A learned per-channel gate of our own: a module type eaves has no kind for."""

    def __init__(self, width: int):
        super().__init__()
        self.scale = nn.Parameter(torch.ones(width))

    def forward(self, x):
        return x * torch.sigmoid(self.scale)


class TinyTagger(nn.Module):
    """Token ids [batch, tokens] -> tag scores per token: embedding, a conv, a block, an LSTM, a head."""

    def __init__(self, vocab: int = 4000, width: int = 128, heads: int = 4, tags: int = 24):
        super().__init__()
        self.embed = nn.Embedding(vocab, width)
        self.local = nn.Conv1d(width, width, kernel_size=3, padding=1, groups=4)
        self.local_act = nn.ReLU()
        self.block = _TaggerBlock(width, heads)
        self.gate = _NoteGate(width)
        self.recur = nn.LSTM(width, width // 2, batch_first=True, bidirectional=True)
        self.drop = nn.Dropout(0.1)
        self.head = nn.Linear(width, tags)
        self.scores = nn.Softmax(dim=-1)

    def forward(self, tokens):
        x = self.embed(tokens)
        x = x + self.local_act(self.local(x.transpose(1, 2))).transpose(1, 2)
        x = self.gate(self.block(x))
        x, _ = self.recur(x)
        return self.scores(self.head(self.drop(x)))


class TinySpotter(nn.Module):
    """Images [batch, 3, h, w] -> class scores: a conv stem, one residual block, pooling, a head."""

    def __init__(self, width: int = 32, classes: int = 10):
        super().__init__()
        self.stem = nn.Conv2d(3, width, 3, stride=2, padding=1, bias=False)
        self.stem_bn = nn.BatchNorm2d(width)
        self.stem_act = nn.ReLU()
        self.pool = nn.MaxPool2d(3, stride=2, padding=1)
        self.conv1 = nn.Conv2d(width, width, 3, padding=1, bias=False)
        self.bn1 = nn.BatchNorm2d(width)
        self.act1 = nn.ReLU()
        self.conv2 = nn.Conv2d(width, width, 3, padding=1, groups=width, bias=False)
        self.bn2 = nn.BatchNorm2d(width)
        self.act2 = nn.ReLU()
        self.gap = nn.AdaptiveAvgPool2d(1)
        self.head = nn.Linear(width, classes)

    def forward(self, x):
        x = self.pool(self.stem_act(self.stem_bn(self.stem(x))))
        y = self.bn2(self.conv2(self.act1(self.bn1(self.conv1(x)))))
        x = self.act2(x + y)
        return self.head(torch.flatten(self.gap(x), 1))


def tiny_tagger() -> nn.Module:
    """The field notes tagger; input: token ids, e.g. --input-shape 8,64 (8 notes of 64 tokens)."""
    return TinyTagger()


def tiny_spotter() -> nn.Module:
    """The trail-camera spotter; input: images, e.g. --input-shape 4,3,96,96."""
    return TinySpotter()
