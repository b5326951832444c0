"""Trie-based deep biasing as a plug-in (Jain et al., Interspeech 2020; Le et al., Interspeech 2021).

The prefix-tree cue (tinyrnnt.bias.trie) says, at every label-history
position, which tokens would continue the current partial word towards a
listed word. It is projected (V -> cue_dim -> tanh) and then to the injection
point: the joiner's predictor side (default), the predictor's input, or both.
In training the whole cue of an utterance is dropped with `cue_dropout`.

With `token_boost`, the cue also goes straight to the token logits, scaled by a
gate computed from the joiner's hidden layer at each (t, u): logits[v] +=
g(t, u) * cue[u, v]. The gate starts at 0 (the model starts as the plain path)
and learns where to follow the tree; the projected cue it sees through the
joiner tells it how narrow the tree is at that point.
"""

from __future__ import annotations

import torch
from torch import Tensor, nn

from tinyrnnt.bias.base import Biaser, BiasingInput, register
from tinyrnnt.bias.trie import BatchedTrees, PrefixTree, training_cue
from tinyrnnt.text import VOCAB_SIZE

CACHE_NODES = 500_000


@register("trie")
class TrieCue(BiasingInput):
    def __init__(self, cfg, joiner_dim: int, embed_dim: int):
        super().__init__(cfg, joiner_dim, embed_dim)
        self.proj = nn.Linear(VOCAB_SIZE, cfg.cue_dim)
        self.to_joiner = nn.Linear(cfg.cue_dim, joiner_dim) if cfg.inject in ("joiner", "both") else None
        self.to_predictor = nn.Linear(cfg.cue_dim, embed_dim) if cfg.inject in ("predictor", "both") else None
        self.to_logits = nn.Linear(joiner_dim, 1) if cfg.token_boost else None
        if self.to_logits is not None:
            nn.init.zeros_(self.to_logits.weight)
            nn.init.zeros_(self.to_logits.bias)
        self._trees: dict[tuple[str, ...], PrefixTree] = {}
        self._cached_nodes = 0

    def tree(self, words: list[str]) -> PrefixTree:
        """The prefix tree of a list; validation lists repeat every validation, so trees are cached
        (bounded by CACHE_NODES tree nodes, about 15 MB per 100k nodes)."""
        key = tuple(words)
        if key not in self._trees:
            tree = PrefixTree(words)
            if self._cached_nodes + tree.n_nodes > CACHE_NODES:
                self._trees.clear()
                self._cached_nodes = 0
            self._trees[key] = tree
            self._cached_nodes += tree.n_nodes
        return self._trees[key]

    def encode(self, cue: Tensor) -> dict[str, Tensor]:
        h = torch.tanh(self.proj(cue))  # (..., cue_dim)
        out = {}
        if self.to_joiner is not None:
            out["joiner"] = self.to_joiner(h)  # (..., Dj)
        if self.to_predictor is not None:
            out["predictor"] = self.to_predictor(h)  # (..., E)
        if self.to_logits is not None:
            out["logits"] = cue  # (..., V)
        return out

    def token_scores(self, hidden: Tensor, cue: Tensor) -> Tensor:
        return self.to_logits(hidden) * cue  # (..., 1) * (..., V)

    def features(self, lists, targets, target_lens) -> dict[str, Tensor]:
        trees = BatchedTrees([self.tree(words) for words in lists])
        cue = training_cue(targets, target_lens, trees, self.cfg.word_start)  # (B, U+1, V)
        if self.training and self.cfg.cue_dropout > 0:
            keep = torch.rand(cue.shape[0], 1, 1, device=cue.device) >= self.cfg.cue_dropout
            cue = cue * keep
        return self.encode(cue)

    def decoder(self, lists) -> "TrieBiaser":
        return TrieBiaser(self, BatchedTrees([self.tree(words) for words in lists]))


class TrieBiaser(Biaser):
    """Per-hypothesis prefix-tree node; advances with every emitted token."""

    def __init__(self, module: TrieCue, trees: BatchedTrees):
        self.module, self.trees = module, trees

    def start(self, B: int) -> Tensor:
        return self.trees.root(torch.arange(B))  # (B,) node ids

    def advance(self, nodes: Tensor, tokens: Tensor, emit: Tensor) -> Tensor:
        moved = self.trees.advance(nodes, tokens, torch.arange(len(nodes)))
        return torch.where(emit, moved, nodes)

    def features(self, nodes: Tensor) -> dict[str, Tensor]:
        return self.module.encode(self.trees.cue(nodes, self.module.cfg.word_start))  # (B, ...)
