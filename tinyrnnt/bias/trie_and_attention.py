"""The trie cue and attention over the list together, as one plug-in ("trie+attention").

It holds a trie cue (tinyrnnt.bias.trie_cue, placed by `bias.inject` and the
other trie settings) and an attention module (tinyrnnt.bias.attention, set by
`bias.options`), and sums their joiner features; the token boost is the
trie's. Trie + attention is the combination Jain et al. (Interspeech 2020)
report as recalling more biased words than either alone.
"""

from __future__ import annotations

from torch import Tensor

from tinyrnnt.bias.attention import AttentionBiaser, ListAttention
from tinyrnnt.bias.base import Biaser, BiasingInput, register
from tinyrnnt.bias.trie_cue import TrieCue


@register("trie+attention")
class TrieAndAttention(BiasingInput):
    """The trie cue and attention over the list together; their joiner features add up."""

    def __init__(self, cfg, joiner_dim: int, embed_dim: int, pred_dim: int | None = None,
                 enc_dim: int | None = None):
        super().__init__(cfg, joiner_dim, embed_dim, pred_dim, enc_dim)
        self.trie = TrieCue(cfg, joiner_dim, embed_dim, pred_dim, enc_dim)
        self.attention = ListAttention(cfg, joiner_dim, embed_dim, pred_dim, enc_dim)

    def features(self, lists, targets, target_lens) -> dict[str, Tensor]:
        return {**self.trie.features(lists, targets, target_lens),
                **self.attention.features(lists, targets, target_lens)}

    def after_predictor(self, features: dict, pred: Tensor) -> dict:
        return self.attention.after_predictor(features, pred)

    def after_encoder(self, features: dict, enc: Tensor, enc_lens: Tensor) -> dict:
        return self.attention.after_encoder(features, enc, enc_lens)

    def hidden_readout(self):
        return self.trie.hidden_readout()

    def token_scores(self, hidden: Tensor, feature: Tensor, logits: Tensor, readout: Tensor | None = None) -> Tensor:
        return self.trie.token_scores(hidden, feature, logits, readout)

    def decoder(self, lists) -> "BothBiaser":
        return BothBiaser(self.trie.decoder(lists), self.attention.decoder(lists))


class BothBiaser(Biaser):
    """State: the trie node first, then the attention state's tensors (one flat tuple, rows first)."""

    def __init__(self, trie: Biaser, attention: AttentionBiaser):
        self.trie, self.attention = trie, attention

    def start(self, B: int):
        return (self.trie.start(B), *self.attention.start(B))

    def advance(self, state, tokens: Tensor, emit: Tensor):
        return (self.trie.advance(state[0], tokens, emit), *self.attention.advance(state[1:], tokens, emit))

    def features(self, state) -> dict:
        return {**self.trie.features(state[0]), **self.attention.features(state[1:])}

    def after_predictor(self, features: dict, pred: Tensor) -> dict:
        return self.attention.after_predictor(features, pred)

    def frames(self, enc: Tensor) -> Tensor | None:
        return self.attention.frames(enc)
