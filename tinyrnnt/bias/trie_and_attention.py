"""The trie cue and attention over the list together, as one plug-in ("trie+attention").

It holds a trie cue (tinyrnnt.bias.trie_cue, placed by `bias.inject` and the
other trie settings) and an attention module (tinyrnnt.bias.attention, set by
`bias.options`), and sums their joiner features; the token boost is the
trie's. Trie + attention is the combination Jain et al. (Interspeech 2020)
report as recalling more biased words than either alone.

With `bias.options.steer` (next-token values, the mixing boost) the trie's
mixing boost mixes towards the attention's weights on the next tokens rather
than uniformly over the tokens the tree allows: t_v proportional to
allowed_v (a_v + STEER_FLOOR), a_v the attention's weight on token v, so where
attention rests on the no-bias entry t is uniform again. Our own variant.
"""

from __future__ import annotations

from torch import Tensor

from tinyrnnt.bias.attention import TOKENS_KEY, AttentionBiaser, ListAttention
from tinyrnnt.bias.base import Biaser, BiasingInput, register
from tinyrnnt.bias.trie_cue import TrieCue

STEER_FLOOR = 1e-3  # weight every allowed token keeps in the steered mixing target


@register("trie+attention")
class TrieAndAttention(BiasingInput):
    """The trie cue and attention over the list together; their joiner features add up."""

    def __init__(self, cfg, joiner_dim: int, embed_dim: int, pred_dim: int | None = None,
                 enc_dim: int | None = None):
        super().__init__(cfg, joiner_dim, embed_dim, pred_dim, enc_dim)
        self.trie = TrieCue(cfg, joiner_dim, embed_dim, pred_dim, enc_dim)
        self.attention = ListAttention(cfg, joiner_dim, embed_dim, pred_dim, enc_dim)
        self.steer = self.attention.opts.steer
        if self.steer and not (cfg.token_boost and cfg.boost_mode in ("mix", "mix_heard")):
            from tinyrnnt.config import ConfigError

            raise ConfigError("bias.options.steer steers the trie's mixing boost: it needs bias.token_boost: true "
                              f"and bias.boost_mode: mix or mix_heard (got {cfg.token_boost} and {cfg.boost_mode!r})")

    def features(self, lists, targets, target_lens) -> dict[str, Tensor]:
        return {**self.trie.features(lists, targets, target_lens),
                **self.attention.features(lists, targets, target_lens)}

    def after_predictor(self, features: dict, pred: Tensor) -> dict:
        return self.steered(self.attention.after_predictor(features, pred))

    def steered(self, features: dict) -> dict:
        """The trie's allowed tokens weighted by the attention's next-token weights (steer), else as is."""
        if not self.steer or "logits" not in features:
            return features
        return {**features, "logits": features["logits"] * (features[TOKENS_KEY] + STEER_FLOOR)}

    def after_encoder(self, features: dict, enc: Tensor, enc_lens: Tensor) -> dict:
        return self.attention.after_encoder(features, enc, enc_lens)

    def hidden_readout(self):
        return self.trie.hidden_readout()

    def token_scores(self, hidden: Tensor, feature: Tensor, logits: Tensor, readout: Tensor | None = None) -> Tensor:
        return self.trie.token_scores(hidden, feature, logits, readout, weighted=self.steer)

    def decoder(self, lists) -> "BothBiaser":
        return BothBiaser(self.trie.decoder(lists), self.attention.decoder(lists), self)


class BothBiaser(Biaser):
    """State: the trie node first, then the attention state's tensors (one flat tuple, rows first)."""

    def __init__(self, trie: Biaser, attention: AttentionBiaser, module: TrieAndAttention):
        self.trie, self.attention, self.module = trie, attention, module

    def start(self, B: int):
        return (self.trie.start(B), *self.attention.start(B))

    def advance(self, state, tokens: Tensor, emit: Tensor):
        return (self.trie.advance(state[0], tokens, emit), *self.attention.advance(state[1:], tokens, emit))

    def features(self, state) -> dict:
        return {**self.trie.features(state[0]), **self.attention.features(state[1:])}

    def after_predictor(self, features: dict, pred: Tensor) -> dict:
        return self.module.steered(self.attention.after_predictor(features, pred))

    def frames(self, enc: Tensor) -> Tensor | None:
        return self.attention.frames(enc)
