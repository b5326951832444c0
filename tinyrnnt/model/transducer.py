"""The transducer (RNN-T, Graves 2012): encoder, predictor, additive joiner.

Dimension glossary (used in every shape comment of the project):

    B  batch                     T  feature frames (10 ms) or, after the encoder, encoder frames
    F  feature bins (mels)       U  target tokens; label positions are 0..U, so U+1 of them
    V  token inventory, blank included (tinyrnnt.text.VOCAB_SIZE)
    D  hidden size (De encoder, Dp predictor, Dj joiner)
    N  biasing-list entries

Plain PyTorch; Lightning lives in `tinyrnnt.model.lightning` only.
"""

from __future__ import annotations

from contextlib import contextmanager

from dataclasses import dataclass

import torch
from torch import Tensor, nn

from tinyrnnt.text import BLANK, VOCAB_SIZE


@dataclass
class ModelConfig:
    feature_bins: int = 80  # F, must match the corpus
    stack_frames: int = 4  # frames concatenated before the first encoder layer (time reduction)
    stack_after_first: int = 2  # further time reduction after the first recurrent layer (1 = none)
    encoder_layers: int = 3
    encoder_dim: int = 160  # De (per direction)
    bidirectional: bool = True  # False = causal, streaming-capable encoder (cheaper, less accurate)
    predictor_dim: int = 256  # Dp
    predictor_embed: int = 64
    stateless_predictor: bool = False  # embedding of the last two tokens only, no LSTM
    joiner_dim: int = 160  # Dj
    dropout: float = 0.1
    # Weight of an auxiliary CTC loss on the first encoder layer's output (0 = no CTC head).
    # Intermediate CTC is common practice to make the encoder learn acoustics early;
    # it only shapes training, decoding never uses the head.
    ctc_weight: float = 0.3

    def __post_init__(self):
        from tinyrnnt.config import ConfigError, require

        require(self, "model", positive=("feature_bins", "stack_frames", "stack_after_first", "encoder_dim",
                                         "predictor_dim", "predictor_embed", "joiner_dim"),
                at_least_zero=("ctc_weight",), fraction=("dropout",))
        if self.encoder_layers < 2:
            raise ConfigError(f"model.encoder_layers must be at least 2 (a first layer, then the rest), "
                              f"got {self.encoder_layers}")

    @property
    def time_reduction(self) -> int:
        return self.stack_frames * self.stack_after_first


def stack_frames(x: Tensor, lengths: Tensor, k: int) -> tuple[Tensor, Tensor]:
    """Concatenate k neighbouring frames: (B, T, D) -> (B, ceil(T/k), k*D).

    >>> y, n = stack_frames(torch.ones(1, 5, 2), torch.tensor([5]), 2)
    >>> tuple(y.shape), n.tolist()
    ((1, 3, 4), [3])
    """
    if k == 1:
        return x, lengths
    B, T, D = x.shape
    pad = (-T) % k
    if pad:
        x = nn.functional.pad(x, (0, 0, 0, pad))
    x = x.reshape(B, (T + pad) // k, k * D)  # (B, T/k, k*D)
    return x, (lengths + k - 1) // k


class Encoder(nn.Module):
    def __init__(self, cfg: ModelConfig):
        super().__init__()
        self.cfg = cfg
        dirs = 2 if cfg.bidirectional else 1
        self.input = nn.Linear(cfg.feature_bins * cfg.stack_frames, cfg.encoder_dim)
        self.first = RecurrentStack(cfg.encoder_dim, cfg.encoder_dim, 1, cfg.bidirectional, 0.0)
        rest_in = cfg.encoder_dim * dirs * cfg.stack_after_first
        self.rest = RecurrentStack(rest_in, cfg.encoder_dim, cfg.encoder_layers - 1, cfg.bidirectional, cfg.dropout)
        self.dropout = nn.Dropout(cfg.dropout)
        self.out_dim = cfg.encoder_dim * dirs

    def forward(self, feats: Tensor, lengths: Tensor, keep_first: bool = False):
        """(B, T', De*dirs) and lengths; with keep_first also the first layer's output and lengths."""
        B, T, F = feats.shape
        x, lengths = stack_frames(feats, lengths, self.cfg.stack_frames)  # (B, T/4, 4F)
        x = torch.relu(self.input(x))  # (B, T/4, De)
        first = self.first(x, lengths)  # (B, T/4, De*dirs), zero past each length
        first_lens = lengths
        x, lengths = stack_frames(self.dropout(first), lengths, self.cfg.stack_after_first)  # (B, T/8, 2*De*dirs)
        x = self.rest(x, lengths)  # (B, T/8, De*dirs)
        if keep_first:
            return self.dropout(x), lengths, first, first_lens
        return self.dropout(x), lengths


def flip_within(x: Tensor, lengths: Tensor) -> Tensor:
    """Reverse each sequence over its own valid frames; padding stays where it is.

    >>> flip_within(torch.tensor([[[1.], [2.], [3.], [0.]]]), torch.tensor([3]))[0, :, 0].tolist()
    [3.0, 2.0, 1.0, 0.0]
    """
    B, T = x.shape[:2]
    t = torch.arange(T, device=x.device)[None, :]  # (1, T)
    n = lengths.to(x.device)[:, None]  # (B, 1)
    idx = torch.where(t < n, n - 1 - t, t)  # (B, T)
    return x.gather(1, idx[..., None].expand_as(x))


class RecurrentStack(nn.Module):
    """Stacked (bi)directional LSTM layers whose outputs do not depend on padding.

    subtle: in one bidirectional nn.LSTM the backward direction starts in the padding, so an
    utterance's output would depend on the longest utterance of its batch. Here the backward
    direction runs on each sequence reversed within its own length, and padded output frames
    are zeroed, so a batch of one and the same utterance in a padded batch agree. (Packing the
    sequences does the same but halved training speed on CPU, measured.)
    """

    def __init__(self, inp: int, hidden: int, layers: int, bidirectional: bool, dropout: float):
        super().__init__()
        dirs = 2 if bidirectional else 1
        sizes = [inp] + [hidden * dirs] * (layers - 1)
        self.forward_layers = nn.ModuleList(nn.LSTM(n, hidden, batch_first=True) for n in sizes)
        self.backward_layers = (nn.ModuleList(nn.LSTM(n, hidden, batch_first=True) for n in sizes)
                                if bidirectional else None)
        self.dropout = nn.Dropout(dropout)

    def forward(self, x: Tensor, lengths: Tensor) -> Tensor:
        B, T, _ = x.shape
        valid = (torch.arange(T, device=x.device)[None, :] < lengths.to(x.device)[:, None])[..., None]  # (B, T, 1)
        for k, fwd in enumerate(self.forward_layers):
            if k > 0:
                x = self.dropout(x)
            out = fwd(x)[0]  # (B, T, D)
            if self.backward_layers is not None:
                back = flip_within(self.backward_layers[k](flip_within(x, lengths))[0], lengths)  # (B, T, D)
                out = torch.cat([out, back], dim=-1)  # (B, T, 2D)
            x = out * valid
        return x


class Predictor(nn.Module):
    """Label history -> one vector per label position u = 0..U (blank doubles as start symbol)."""

    def __init__(self, cfg: ModelConfig):
        super().__init__()
        self.cfg = cfg
        self.embed = nn.Embedding(VOCAB_SIZE, cfg.predictor_embed)
        if cfg.stateless_predictor:
            self.mix = nn.Linear(2 * cfg.predictor_embed, cfg.predictor_dim)
        else:
            self.lstm = nn.LSTM(cfg.predictor_embed, cfg.predictor_dim, batch_first=True)
        self.out_dim = cfg.predictor_dim

    def forward(self, targets: Tensor, extra: Tensor | None = None) -> Tensor:
        B, U = targets.shape
        start = torch.full((B, 1), BLANK, dtype=targets.dtype, device=targets.device)
        history = torch.cat([start, targets], dim=1)  # (B, U+1)
        out, _ = self.step(history, None, extra)
        return out  # (B, U+1, Dp)

    def step(self, tokens: Tensor, state, extra: Tensor | None = None):
        """tokens (B, L) -> outputs (B, L, Dp) and the new state (for decoding, L = 1).

        extra (B, L, E): a biasing feature added to the input embedding (predictor injection).
        """
        e = self.embed(tokens)  # (B, L, E)
        if extra is not None:
            e = e + extra
        if self.cfg.stateless_predictor:
            prev = e[:, :1] * 0 if state is None else state
            both = torch.cat([torch.cat([prev, e[:, :-1]], dim=1), e], dim=-1)  # (B, L, 2E)
            return torch.tanh(self.mix(both)), e[:, -1:]
        return self.lstm(e, state)

    def select_state(self, state, index: Tensor):
        """The states of rows `index` (decoding: beam search reorders and copies hypotheses)."""
        if self.cfg.stateless_predictor:
            return state.index_select(0, index)  # (B, 1, E)
        return tuple(s.index_select(1, index) for s in state)  # LSTM (layers, B, D) each

    def put_state(self, state, index: Tensor, rows, inplace: bool = False):
        """`state` with rows `index` replaced by `rows` (a state of len(index) rows): a copy, or
        `state` itself changed in place."""
        if self.cfg.stateless_predictor:
            return state.index_copy_(0, index, rows) if inplace else state.index_copy(0, index, rows)
        if inplace:
            return tuple(s.index_copy_(1, index, r) for s, r in zip(state, rows))
        return tuple(s.index_copy(1, index, r) for s, r in zip(state, rows))

    def cat_states(self, states: list):
        """Rows of several states one after another."""
        if self.cfg.stateless_predictor:
            return torch.cat(states, 0)
        return tuple(torch.cat(parts, 1) for parts in zip(*states))


class Joiner(nn.Module):
    """Additive joiner: tanh(W_e enc + W_p pred [+ biasing feature]) -> V logits."""

    def __init__(self, enc_dim: int, pred_dim: int, cfg: ModelConfig):
        super().__init__()
        self.enc_proj = nn.Linear(enc_dim, cfg.joiner_dim)
        self.pred_proj = nn.Linear(pred_dim, cfg.joiner_dim)
        self.out = nn.Linear(cfg.joiner_dim, VOCAB_SIZE)

    def label_side(self, pred: Tensor, label_bias: Tensor | None = None) -> Tensor:
        """Predictor projection per label position; THE place biasing features enter the joiner.

        label_bias (B, U+1, Dj), e.g. a projected prefix-tree cue, is added to the
        predictor side before the broadcast over T, so it costs O(B*U*Dj), not O(B*T*U*Dj).
        """
        p = self.pred_proj(pred)  # (B, U+1, Dj)
        return p if label_bias is None else p + label_bias

    def hidden(self, enc: Tensor, pred: Tensor, label_bias: Tensor | None = None,
               frame_bias: Tensor | None = None) -> Tensor:
        """frame_bias (B, T, Dj): a biasing feature per encoder frame, added to the encoder side."""
        e = self.enc_proj(enc)  # (B, T, Dj)
        if frame_bias is not None:
            e = e + frame_bias
        p = self.label_side(pred, label_bias)  # (B, U+1, Dj)
        return torch.tanh(e[:, :, None, :] + p[:, None, :, :])  # (B, T, U+1, Dj)

    def forward(self, enc: Tensor, pred: Tensor, label_bias: Tensor | None = None) -> Tensor:
        return self.out(self.hidden(enc, pred, label_bias))  # (B, T, U+1, V)


class Transducer(nn.Module):
    """Encoder + predictor + joiner, with one optional biasing input (a plug-in, tinyrnnt.bias)."""

    def __init__(self, cfg: ModelConfig, bias=None):
        super().__init__()
        from tinyrnnt.bias.base import build_biasing

        self.cfg = cfg
        self.encoder = Encoder(cfg)
        self.predictor = Predictor(cfg)
        self.joiner = Joiner(self.encoder.out_dim, self.predictor.out_dim, cfg)
        self.bias = (build_biasing(bias, cfg.joiner_dim, cfg.predictor_embed, cfg.predictor_dim,
                                   self.encoder.out_dim) if bias is not None else None)
        # Weight of the biasing input's token scores (the trie's token boost) in token_logits: 1 as
        # trained; decoding with shallow fusion may lower it (decode.model_boost_scale).
        self.token_boost_scale = 1.0
        self.ctc_head = nn.Linear(self.encoder.out_dim, VOCAB_SIZE) if cfg.ctc_weight > 0 else None

    def forward(self, feats: Tensor, feat_lens: Tensor, targets: Tensor, target_lens: Tensor | None = None,
                lists: list[list[str]] | None = None, label_bias: Tensor | None = None):
        """Joiner logits (B, T', U+1, V) and encoder lengths.

        With a biasing input and `lists` (one list of words per utterance), its
        features enter at the configured injection point; `label_bias` adds a
        ready-made joiner feature (B, U+1, Dj) directly.
        """
        logits, enc_lens, _, _ = self._run(feats, feat_lens, targets, target_lens, lists, label_bias, False)
        return logits, enc_lens

    def _run(self, feats, feat_lens, targets, target_lens, lists, label_bias, keep_first: bool):
        extra = {}
        if target_lens is None:
            target_lens = torch.full((len(targets),), targets.shape[1])
        if self.bias is not None and lists is not None:
            extra = self.bias.features(lists, targets, target_lens)
        enc, enc_lens, *first = self.encoder(feats, feat_lens, keep_first=keep_first)  # (B, T', De)
        pred = self.predictor(targets, extra.get("predictor"))  # (B, U+1, Dp)
        if self.bias is not None and lists is not None:  # features that read the encoder or predictor output
            extra = self.bias.after_predictor(self.bias.after_encoder(extra, enc, enc_lens), pred)
        joiner_bias = extra.get("joiner")
        if label_bias is not None:
            joiner_bias = label_bias if joiner_bias is None else joiner_bias + label_bias
        hidden = self.joiner.hidden(enc, pred, joiner_bias, extra.get("encoder"))  # (B, T', U+1, Dj)
        token_feature = extra["logits"][:, None] if "logits" in extra else None  # (B, 1, U+1, V)
        # a biasing input's own training loss (e.g. guided attention), added to the objective
        return self.token_logits(hidden, token_feature), enc_lens, first, extra.get("loss")  # (B, T', U+1, V)

    def token_logits(self, hidden: Tensor, token_feature: Tensor | None = None) -> Tensor:
        """Joiner hidden layer (..., Dj) -> logits (..., V), plus the biasing input's token scores
        when it gives a "logits" feature; training and decoding both come through here."""
        out = self.joiner.out
        readout = self.bias.hidden_readout() if token_feature is not None else None
        if readout is None:
            logits = out(hidden)
            if token_feature is None:
                return logits
            scores = self.bias.token_scores(hidden, token_feature, logits)
        else:
            both = nn.functional.linear(hidden, torch.cat([out.weight, readout.weight]),
                                        torch.cat([out.bias, readout.bias]))  # (..., V + k): one pass over hidden
            logits = both[..., :VOCAB_SIZE]
            scores = self.bias.token_scores(hidden, token_feature, logits, readout=both[..., VOCAB_SIZE:])
        return logits + (scores if self.token_boost_scale == 1.0 else self.token_boost_scale * scores)

    @contextmanager
    def scaled_token_boost(self, scale: float):
        """The biasing input's token scores weighted by `scale` inside the block (decoding with
        decode.model_boost_scale), as trained again after it."""
        self.token_boost_scale = float(scale)
        try:
            yield self
        finally:
            self.token_boost_scale = 1.0

    def losses(self, feats, feat_lens, targets, target_lens, lists=None, implementation: str = "ours") -> dict:
        """Training objective: transducer loss (+ weighted auxiliary CTC); plain PyTorch, no Trainer needed."""
        from tinyrnnt.model.loss import transducer_loss

        keep = self.ctc_head is not None
        logits, enc_lens, first, bias_loss = self._run(feats, feat_lens, targets, target_lens, lists, None, keep)
        with torch.autocast(logits.device.type, enabled=False):  # under bf16 autocast the loss stays float32
            out = {"rnnt": transducer_loss(logits.float(), targets, enc_lens, target_lens,
                                           implementation=implementation)}
        out["loss"] = out["rnnt"]
        if keep:
            with torch.autocast(first[0].device.type, enabled=False):
                out["ctc"] = self.ctc_loss(first[0].float(), first[1], targets, target_lens)
            out["loss"] = out["rnnt"] + self.cfg.ctc_weight * out["ctc"]
        if bias_loss is not None:
            out["bias"] = bias_loss.float()
            out["loss"] = out["loss"] + out["bias"]
        return out

    def ctc_loss(self, first: Tensor, first_lens: Tensor, targets: Tensor, target_lens: Tensor) -> Tensor:
        """Auxiliary CTC (Graves et al., 2006) on the first encoder layer, mean over the batch."""
        logp = torch.log_softmax(self.ctc_head(first), dim=-1).transpose(0, 1)  # (T/4, B, V)
        loss = nn.functional.ctc_loss(logp, targets, first_lens, target_lens, blank=BLANK,
                                      reduction="sum", zero_infinity=True)
        return loss / len(targets)


def count_parameters(model: nn.Module) -> int:
    return sum(p.numel() for p in model.parameters())


def lstm_flops(inp: int, hidden: int, steps: int, dirs: int = 1) -> int:
    """Multiply-adds x2 of one LSTM layer over `steps` frames (four gates), forward pass."""
    return 2 * 4 * hidden * (inp + hidden) * steps * dirs


def training_flops(cfg: ModelConfig, T: int, U: int) -> int:
    """Analytic FLOPs of one forward + backward pass for one utterance (backward = 2x forward).

    Counts the matrix products (LSTMs, projections, joiner grid); elementwise work is left out.
    """
    dirs = 2 if cfg.bidirectional else 1
    t1 = -(-T // cfg.stack_frames)
    t2 = -(-t1 // cfg.stack_after_first)
    f = 2 * cfg.feature_bins * cfg.stack_frames * cfg.encoder_dim * t1
    f += lstm_flops(cfg.encoder_dim, cfg.encoder_dim, t1, dirs)
    f += lstm_flops(cfg.encoder_dim * dirs * cfg.stack_after_first, cfg.encoder_dim, t2, dirs)
    f += (cfg.encoder_layers - 2) * lstm_flops(cfg.encoder_dim * dirs, cfg.encoder_dim, t2, dirs)
    if cfg.stateless_predictor:
        f += 2 * 2 * cfg.predictor_embed * cfg.predictor_dim * (U + 1)
    else:
        f += lstm_flops(cfg.predictor_embed, cfg.predictor_dim, U + 1)
    f += 2 * cfg.encoder_dim * dirs * cfg.joiner_dim * t2 + 2 * cfg.predictor_dim * cfg.joiner_dim * (U + 1)
    f += 2 * cfg.joiner_dim * VOCAB_SIZE * t2 * (U + 1)
    return 3 * f
