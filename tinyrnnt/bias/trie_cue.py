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
MIX_GATE_START = -3.0  # the mixing gate starts at sigmoid(-3) = 0.05: the model begins near its plain self


@register("trie")
class TrieCue(BiasingInput):
    def __init__(self, cfg, joiner_dim: int, embed_dim: int, pred_dim: int | None = None,
                 enc_dim: int | None = None):
        super().__init__(cfg, joiner_dim, embed_dim, pred_dim, enc_dim)
        self.proj = nn.Linear(VOCAB_SIZE, cfg.cue_dim)
        self.to_joiner = nn.Linear(cfg.cue_dim, joiner_dim) if cfg.inject in ("joiner", "both") else None
        self.to_predictor = nn.Linear(cfg.cue_dim, embed_dim) if cfg.inject in ("predictor", "both") else None
        self.to_logits = nn.Linear(joiner_dim, 1) if cfg.token_boost else None
        if self.to_logits is not None:
            nn.init.zeros_(self.to_logits.weight)
            nn.init.zeros_(self.to_logits.bias)
            if cfg.boost_mode in ("mix", "mix_heard"):
                nn.init.constant_(self.to_logits.bias, MIX_GATE_START)
                # scales the whole correction; 0 gives exactly the plain logits
                self.to_mix_scale = nn.Parameter(torch.ones(()))
            if cfg.boost_mode == "mix_heard":
                # sharpness of the mixing target over the allowed tokens: 0 uniform, 1 the model's own
                self.mix_sharpness = nn.Parameter(torch.ones(()))
        # subtle: cue dropout draws from its own generator (seeded from the training seed, which
        # seed_everything set before the model was built), so the biased arm consumes the global
        # stream exactly as its control does: same dropout masks, same feature masks.
        self._dropout_rng = torch.Generator().manual_seed(torch.initial_seed())
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

    def hidden_readout(self) -> nn.Linear | None:
        return self.to_logits  # the gate, computed with the joiner's output layer

    def token_scores(self, hidden: Tensor, cue: Tensor, logits: Tensor, readout: Tensor | None = None,
                     weighted: bool = False) -> Tensor:
        """weighted: the cue holds weights of a mixing target, not 0/1 (weighted_mix_correction)."""
        gate = self.to_logits(hidden) if readout is None else readout  # (..., 1)
        if self.cfg.boost_mode == "add":
            return gate * cue  # (..., 1) * (..., V)
        if self.cfg.boost_mode == "mix_heard" and not weighted:
            return self.to_mix_scale * heard_mix_correction(logits, cue, gate[..., 0], self.mix_sharpness)
        mix = weighted_mix_correction if weighted else mix_correction
        return self.to_mix_scale * mix(logits, cue, gate[..., 0])

    def features(self, lists, targets, target_lens) -> dict[str, Tensor]:
        trees = BatchedTrees([self.tree(words) for words in lists])
        cue = training_cue(targets, target_lens, trees, self.cfg.word_start)  # (B, U+1, V)
        if self.training and self.cfg.cue_dropout > 0:
            keep = (torch.rand(cue.shape[0], 1, 1, generator=self._dropout_rng) >= self.cfg.cue_dropout).to(cue.device)
            cue = cue * keep
        return self.encode(cue)

    def decoder(self, lists) -> "TrieBiaser":
        return TrieBiaser(self, BatchedTrees([self.tree(words) for words in lists]))


def mix_correction(logits: Tensor, cue: Tensor, gate: Tensor) -> Tensor:
    """What to add to `logits` (..., V) so that, where the tree allows some tokens, the non-blank
    distribution becomes (1 - w) q + w t: q the model's own choice among non-blank tokens, t uniform
    over the tokens the cue (..., V) allows, w = sigmoid(gate (...)). Blank's probability and the
    normaliser stay as they were; where the cue is all zero the correction is 0.

    subtle: p'(v) = p(v) ((1 - w) + w t(v) / q(v)) for v != blank, which sums to 1 - p(blank). In
    log space, with q(v) = exp(z_v - lse) (lse: logsumexp of the non-blank logits z) and t = 1/c
    on the c allowed tokens, log((1 - w) + w t / q) = log(1 - w) + softplus(g + lse - log c - z_v)
    where allowed (log w - log(1 - w) = g), and log(1 - w) elsewhere: one reduction and one
    softplus over the lattice, about half the time of the plain mixture formula (which the test
    in tests/test_bias.py checks it against).

    >>> logits = torch.tensor([0.0, 2.0, 0.0, -9.0])          # blank, then three tokens
    >>> cue = torch.tensor([0.0, 0.0, 0.0, 1.0])              # the tree allows only the last
    >>> p = torch.softmax(logits + mix_correction(logits, cue, torch.tensor(0.0)), -1)
    >>> [round(x, 3) for x in p.tolist()]  # blank kept; half the rest goes to the allowed token
    [0.107, 0.393, 0.053, 0.447]
    """
    return _MixCorrection.apply(logits, cue, gate)


def weighted_mix_correction(logits: Tensor, weights: Tensor, gate: Tensor) -> Tensor:
    """mix_correction with t proportional to `weights` (..., V), non-negative, instead of uniform over
    the allowed tokens: t_v = weights_v / sum(weights) where weights_v > 0. Plain autograd, so the
    gradient reaches whatever computed the weights (attention's next-token distribution steering
    the trie's mixing boost in trie + attention). With 0/1 weights it equals mix_correction.

    >>> logits, gate = torch.tensor([0.0, 2.0, 0.0, -9.0]), torch.tensor(0.0)
    >>> cue = torch.tensor([0.0, 0.0, 0.0, 1.0])
    >>> torch.allclose(weighted_mix_correction(logits, cue, gate), mix_correction(logits, cue, gate))
    True
    """
    z, w = logits[..., 1:], weights[..., 1:]  # (..., V-1), blank is token 0
    total = w.sum(-1, keepdim=True)  # (..., 1)
    live = (total > 0).to(logits.dtype)  # no weight anywhere changes nothing
    g = gate[..., None]  # (..., 1)
    lse = torch.logsumexp(z, dim=-1, keepdim=True)
    log_t = torch.log(w.clamp(min=1e-30)) - torch.log(total.clamp(min=1e-30))  # (..., V-1)
    return _mixed(g, g + lse + log_t - z, w > 0, live)


def heard_mix_correction(logits: Tensor, cue: Tensor, gate: Tensor, sharpness: Tensor) -> Tensor:
    """mix_correction with the mixing target t over the allowed tokens taken from the model itself:
    t_v proportional to q_v ** sharpness on the tokens the cue allows (0 on the rest), q the model's
    non-blank choice. Sharpness 0 is the uniform target of mix_correction; 1 keeps the model's own
    preference among the allowed tokens, so where the tree allows several letters the sound picks
    one, and where it allows one the target is that letter whatever the model thinks of it (the
    pointer over the tree's children of Sun et al. 2021, here with the model's own scores as the
    pointer). Plain autograd, so the sharpness is learned. A cue of weights instead of 0/1 (keyword
    spotting while decoding, tinyrnnt.bias.spotting) multiplies the target: t_v ~ cue_v q_v ** s.

    >>> logits, gate = torch.tensor([0.0, 2.0, 0.0, -9.0]), torch.tensor(0.0)
    >>> cue = torch.tensor([0.0, 0.0, 1.0, 1.0])
    >>> torch.allclose(heard_mix_correction(logits, cue, gate, torch.tensor(0.0)), mix_correction(logits, cue, gate))
    True
    """
    z, allowed = logits[..., 1:], cue[..., 1:] > 0  # (..., V-1), blank is token 0
    live = allowed.any(-1, keepdim=True)  # (..., 1)
    g = gate[..., None]  # (..., 1)
    lse = torch.logsumexp(z, dim=-1, keepdim=True)  # (..., 1)
    sharp = sharpness * z  # (..., V-1)
    if not bool(((cue == 0) | (cue == 1)).all()):  # weights, not 0/1 (decode.spotting): t_v ~ cue_v q_v ** s
        sharp = sharp + torch.log(cue[..., 1:].clamp_min(1e-30))
    lse_allowed = torch.logsumexp(sharp.masked_fill(~allowed, -1e30), dim=-1, keepdim=True)  # (..., 1)
    return _mixed(g, g + lse + sharp - lse_allowed - z, allowed, live)


def _mixed(g: Tensor, s: Tensor, target: Tensor, live: Tensor) -> Tensor:
    """The correction of the plain-autograd mixtures: log(1 - w) where the cue is live, plus
    softplus(s) on the target's tokens (s = log(w / (1 - w)) + log t_v - log q_v), blank's 0 put back."""
    corr = nn.functional.logsigmoid(-g) * live + torch.where(target, nn.functional.softplus(s), torch.zeros_like(s))
    return nn.functional.pad(corr, (1, 0))  # (..., V)


class _MixCorrection(torch.autograd.Function):
    """mix_correction with its gradient written out, in fewer passes over the lattice than
    autograd's chain of elementwise steps (the lattice is (B, T', U+1, V): every pass counts).

    With a the allowed tokens (cue, zero where the cue is dead), s = g + lse - log c - z,
    corr_v = log sigmoid(-g) + a_v softplus(s_v) and G the incoming gradient:
    d corr_v / d z_j = a_v sigmoid(s_v) (q_j - [v = j]), q = softmax(z), so with
    r_v = G_v a_v sigmoid(s_v) and S = sum_v r_v: grad z_j = q_j S - r_j;
    grad g = S - sigmoid(g) sum_v G_v (over live cues). Checked against autograd by
    torch.autograd.gradcheck in tests/test_bias.py.
    """

    @staticmethod
    def forward(ctx, logits: Tensor, cue: Tensor, gate: Tensor) -> Tensor:
        z = logits[..., 1:]  # (..., V-1), blank is token 0
        allowed = cue[..., 1:]  # (..., V-1), 1.0 where the tree allows the token
        count = allowed.sum(-1, keepdim=True)  # (..., 1)
        live = (count > 0).to(logits.dtype)  # a dead cue changes nothing
        g = gate[..., None]  # (..., 1)
        lse = torch.logsumexp(z, dim=-1, keepdim=True)  # (..., 1)
        s = (g + lse - torch.log(count.clamp(min=1))) - z  # (..., V-1)
        spread = allowed * live  # (..., V-1), small: the cue is shared over frames
        corr = torch.addcmul(nn.functional.logsigmoid(-g) * live, spread, nn.functional.softplus(s))
        if any(ctx.needs_input_grad):  # decoding needs no backward pass: skip its sigmoid over the lattice
            ctx.save_for_backward(z, lse, g, live, spread, torch.sigmoid(s))
            ctx.gate_shape = gate.shape
        return nn.functional.pad(corr, (1, 0))  # (..., V), blank's correction 0

    @staticmethod
    def backward(ctx, grad: Tensor):
        z, lse, g, live, spread, sig = ctx.saved_tensors
        grad_z = grad[..., 1:]
        r = (grad_z * sig).mul_(spread)  # (..., V-1)
        total = r.sum(-1, keepdim=True)  # S
        grad_logits = nn.functional.pad(torch.sub(z, lse).exp_().mul_(total).sub_(r), (1, 0))  # q S - r
        grad_gate = (total - torch.sigmoid(g) * live * grad_z.sum(-1, keepdim=True))[..., 0]
        return grad_logits, None, grad_gate.sum_to_size(ctx.gate_shape)  # a broadcast gate sums its share


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
