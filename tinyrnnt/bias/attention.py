"""Attention biasing over the list, as a plug-in.

Attention over phrase vectors (CLAS, Pundak et al., SLT 2018; the attention
module of Jain et al., Interspeech 2020): every listed entry's tokens become
one vector (the phrase encoder: token embeddings, then a convolution with
max-pooling, or a bidirectional LSTM with mean-pooling), and a learned
"no-bias" entry is put first so the model can attend to nothing. The query is
the predictor output at each label position (`query: predictor`, as in CLAS);
scaled dot-product attention (Vaswani et al., 2017) over the entries gives a
context vector, projected into the joiner's predictor side. With `query:
encoder` the query is the encoder output at each frame instead and the context
enters the joiner's encoder side (one context per frame, computed once per
utterance before the search). Phrase vectors are computed once per list (a
batch encodes its distinct words once) and reused at every decoding step.

Phrase gate (`phrase_gate`, the prefix conditioning of CLAS 2018 applied to the
entry's own tokens): "all" lets every entry be attended to everywhere;
"prefix" only entries that the current partial word (tokens since the last
word boundary, empty at a word start) is a prefix of, so at a word start all
entries; "started" only entries whose first tokens the hypothesis has already
written, so at a word start none (the no-bias entry only). The gate needs the
label history, so it goes with the predictor query only. An entry with a
space (a phrase of several words) is followed across its spaces; a match
restarts at every word boundary. The no-bias entry is never masked.

Deliberately not here: multi-head attention, a query from both states.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import torch
from torch import Tensor, nn

from tinyrnnt.bias.base import Biaser, BiasingInput, register
from tinyrnnt.bias.guide import guide_loss, guide_targets
from tinyrnnt.text import BLANK, SPACE, VOCAB_SIZE, encode

ENCODERS = ("conv", "lstm")
GATES = ("all", "prefix", "started")
QUERIES = ("predictor", "encoder")
VALUES = ("phrase", "next_token")
MASK_KEY, ROW_KEY, GUIDE_KEY = "attention_mask", "attention_rows", "attention_guide"  # the module's own entries
NEXT_KEY = "attention_next"  # each entry's next token after the partial word (values: next_token)
TOKENS_KEY = "attention_tokens"  # attention's weight on each next token, (..., V) (values: next_token)
ROW_CACHE = 200_000  # words whose token ids token_table keeps
_ROWS: dict[str, np.ndarray] = {}


@dataclass
class AttentionSettings:
    """`bias.options` of the attention inputs."""

    dim: int = 64  # Da: size of phrase vectors, keys and queries
    embed: int = 32  # token embedding size of the phrase encoder
    encoder: str = "conv"  # phrase encoder: "conv" (convolution + max-pool) or "lstm" (bidirectional + mean-pool)
    width: int = 3  # convolution width in tokens (odd)
    phrase_gate: str = "all"  # which entries may be attended to: all | prefix | started (module docstring)
    query: str = "predictor"  # whose state asks: the predictor's (per label position) or the encoder's (per frame)
    # Weight of the guided attention loss in training (tinyrnnt.bias.guide): the attention is told
    # which entry the transcript is spelling at each label position; 0 = none. Needs query: predictor.
    guide: float = 0.0
    # What an attended entry gives: its phrase vector ("phrase", CLAS), or an embedding of its next
    # token after the partial word being spelled ("next_token"; a space once the entry is complete),
    # so the context says which letter the attended entries continue with. Needs a phrase gate.
    values: str = "phrase"
    # trie + attention only: the trie's mixing boost mixes towards the attention's weights on the
    # next tokens (uniform over the tree's allowed tokens where attention rests on no-bias) instead
    # of uniform over them, so the two inputs do not hand the joiner the same signal twice.
    steer: bool = False
    # Training only: the share of training utterances whose attention context is left out of the
    # joiner (drawn per utterance and step; no rescaling, decoding always uses it). In trie + attention
    # the trie cue then also learns to stand alone rather than lean on the attention's copy of its
    # signal (modality dropout, common practice; written from memory). 0 = never.
    context_dropout: float = 0.0

    def __post_init__(self):
        from tinyrnnt.config import ConfigError, require

        require(self, "bias.options", positive=("dim", "embed", "width"), at_least_zero=("guide", "context_dropout"))
        if self.context_dropout >= 1:
            raise ConfigError(f"bias.options.context_dropout is a share of utterances, below 1; got {self.context_dropout}")
        for name, value, choices in (("encoder", self.encoder, ENCODERS), ("phrase_gate", self.phrase_gate, GATES),
                                     ("query", self.query, QUERIES), ("values", self.values, VALUES)):
            if value not in choices:
                raise ConfigError(f"bias.options.{name} must be one of {list(choices)}, got {value!r}")
        if self.width % 2 == 0:
            raise ConfigError(f"bias.options.width must be odd (the convolution keeps the length), got {self.width}")
        if self.query == "encoder" and self.phrase_gate != "all":
            raise ConfigError(f"bias.options.phrase_gate {self.phrase_gate!r} needs the label history, so "
                              "query: predictor; with query: encoder it must be 'all'")
        if self.values == "next_token" and self.phrase_gate == "all":
            raise ConfigError("bias.options.values 'next_token' needs phrase_gate 'prefix' or 'started' "
                              "(the entries' match positions); got phrase_gate 'all'")
        if self.steer and self.values != "next_token":
            raise ConfigError("bias.options.steer needs values: next_token (the weights it steers with)")
        if self.query == "encoder" and self.guide > 0:
            raise ConfigError("bias.options.guide needs query: predictor (its targets are label positions); "
                              f"got query: encoder with guide {self.guide}")
        if self.encoder == "lstm" and self.dim % 2:
            raise ConfigError(f"bias.options.dim must be even with the lstm encoder (two directions), got {self.dim}")


def read_settings(options: dict) -> AttentionSettings:
    from tinyrnnt.config import from_dict

    return from_dict(AttentionSettings, dict(options), "bias.options")


def token_table(words: list[str]) -> tuple[Tensor, Tensor]:
    """Token ids of each entry, padded with blank: (W, L) and lengths (W,).

    >>> ids, n = token_table(["ab", "c"])
    >>> ids.tolist(), n.tolist()
    ([[3, 4], [5, 0]], [2, 1])
    """

    rows = []
    for w in words:
        row = _ROWS.get(w)
        if row is None:  # checked and encoded once per word: training lists repeat the inventory's words
            if not w.strip():
                raise ValueError("biasing list: an empty entry; expected letters")
            if len(_ROWS) >= ROW_CACHE:
                _ROWS.clear()
            row = _ROWS[w] = np.array(encode(w, where=f"biasing list entry {w!r}"), dtype=np.int64)
        rows.append(row)
    lengths = np.array([len(r) for r in rows], dtype=np.int64)
    L = int(lengths.max()) if len(rows) else 1
    # one flat array, scattered into place: a Python loop of small tensor writes cost more than
    # the phrase encoder itself at N = 5000
    flat = np.concatenate(rows) if rows else np.zeros(0, dtype=np.int64)
    ids = np.full((len(rows), L), BLANK, dtype=np.int64)
    ids[np.arange(L)[None, :] < lengths[:, None]] = flat
    return torch.from_numpy(ids), torch.from_numpy(lengths)


def advance_gate(pos: Tensor, fresh: Tensor, tokens: Tensor, table: Tensor | None, lengths: Tensor,
                 at: Tensor | None = None, first: Tensor | None = None) -> tuple[Tensor, Tensor]:
    """Match positions after one token: pos (n, N) tokens of each entry matched so far (-1 = not
    being spelled), fresh (n,) true at a word start, tokens (n,), table (n, N, L), lengths (n, N).

    subtle: a token that continues an entry wins over the word boundary (entries may hold spaces);
    a word boundary restarts every entry at 0; a token at a word start may begin an entry that a
    multi-word match was still following.

    >>> t, n = token_table(["ab", "b"])
    >>> pos, fresh = torch.zeros(1, 2, dtype=torch.long), torch.ones(1, dtype=torch.bool)
    >>> pos, fresh = advance_gate(pos, fresh, torch.tensor([3]), t[None], n[None])  # "a"
    >>> pos.tolist()
    [[1, -1]]
    """
    if at is None:  # at, first: each entry's token at pos and its first token, when gathered already
        at = table.gather(2, pos.clamp(0, table.shape[-1] - 1)[..., None])[..., 0]  # (n, N) the entry's next token
    first = table[..., 0] if first is None else first  # (n, N)
    y = tokens[:, None]  # (n, 1)
    cont = (pos >= 0) & (pos < lengths) & (at == y)
    begin = fresh[:, None] & (first == y)
    new = torch.where(cont, pos + 1, torch.where(y == SPACE, torch.zeros_like(pos),
                                                 torch.where(begin, torch.ones_like(pos), torch.full_like(pos, -1))))
    return new, tokens == SPACE


def next_tokens(table: Tensor, lengths: Tensor, pos: Tensor) -> Tensor:
    """Each entry's token after `pos` matched tokens, a space once it is complete: table (..., N, L),
    lengths (..., N), pos (..., N) broadcast against them -> (..., N). Entries not being spelled
    (pos -1) get their first token; the phrase gate gives them no weight.

    >>> t, n = token_table(["ab", "b"])
    >>> next_tokens(t, n, torch.tensor([1, 1])).tolist() == [4, SPACE]
    True
    """
    table, pos = torch.broadcast_tensors(table, pos[..., None].clamp_min(0))
    at = table.gather(-1, pos[..., :1].clamp(max=table.shape[-1] - 1))[..., 0]  # (..., N)
    return torch.where(pos[..., 0] >= lengths, torch.full_like(at, SPACE), at)


def tokens_at(table: Tensor, rows: Tensor, pos: Tensor) -> Tensor:
    """Each entry's token at pos (clamped into the entry's row), (n, N), of rows `rows` (n,) of a
    table (R, N, L).

    subtle: read from the flat table by index; table[rows] would copy (n, N, L) tokens at every
    decoding step, which at N = 5000 cost more than the attention itself.

    >>> t, _ = token_table(["ab", "c"])
    >>> tokens_at(t[None], torch.tensor([0]), torch.tensor([[1, 0]])).tolist() == [[4, 5]]
    True
    """
    R, N, L = table.shape
    at = (rows[:, None] * N + torch.arange(N)) * L + pos.clamp(0, L - 1)  # (n, N)
    return table.reshape(-1)[at]


class Memory:
    """The distinct lists of a set of rows (beam search gives each utterance's list once per
    hypothesis slot), each list's entries as indices into the distinct words, and which list
    each row reads."""

    def __init__(self, lists: list[list[str]]):
        words: dict[str, int] = {}
        distinct: dict[tuple[str, ...], int] = {}
        self.which = torch.tensor([distinct.setdefault(tuple(lst), len(distinct)) for lst in lists],
                                  dtype=torch.long)  # (R,) list of each row
        index = [[words.setdefault(w, len(words)) for w in lst] for lst in distinct]
        N = max((len(x) for x in index), default=0)
        self.index = torch.zeros(len(index), N, dtype=torch.long)  # (lists, N)
        self.valid = torch.zeros(len(index), N, dtype=torch.bool)  # (lists, N)
        for r, x in enumerate(index):
            self.index[r, : len(x)] = torch.tensor(x, dtype=torch.long)
            self.valid[r, : len(x)] = True
        self.ids, self.lengths = token_table(list(words))  # (W, L), (W,)


@register("attention")
class ListAttention(BiasingInput):
    def __init__(self, cfg, joiner_dim: int, embed_dim: int, pred_dim: int | None = None,
                 enc_dim: int | None = None):
        super().__init__(cfg, joiner_dim, embed_dim, pred_dim, enc_dim)
        o = self.opts = read_settings(cfg.options)
        asker = pred_dim if o.query == "predictor" else enc_dim
        if asker is None:
            raise ValueError(f"attention biasing with query {o.query!r} needs that state's size "
                             f"(build_biasing's {'pred_dim' if o.query == 'predictor' else 'enc_dim'})")
        self.embed = nn.Embedding(VOCAB_SIZE, o.embed, padding_idx=BLANK)  # padding embeds to zeros
        if o.encoder == "conv":
            self.conv = nn.Conv1d(o.embed, o.dim, o.width, padding=o.width // 2)
        else:
            from tinyrnnt.model.transducer import RecurrentStack

            self.lstm = RecurrentStack(o.embed, o.dim // 2, 1, True, 0.0)
        self.no_bias = nn.Parameter(torch.randn(o.dim) * 0.1)  # the "attend to nothing" entry
        self.query = nn.Linear(asker, o.dim)
        self.key = nn.Linear(o.dim, o.dim)
        self.to_joiner = nn.Linear(o.dim, joiner_dim)
        if o.values == "next_token":
            self.next_embed = nn.Embedding(VOCAB_SIZE, o.dim)

    def encode_phrases(self, ids: Tensor, lengths: Tensor) -> Tensor:
        """(W, L) token ids -> (W, Da) phrase vectors, independent of the padding."""
        if ids.shape[0] == 0:
            return torch.zeros(0, self.opts.dim)
        W, L = ids.shape
        valid = (torch.arange(L)[None, :] < lengths[:, None])[..., None]  # (W, L, 1)
        if self.opts.encoder == "conv":
            h = self.token_convolution(ids)  # (W, L, Da), before the ReLU
            if not torch.is_grad_enabled():
                # decoding: relu(max over the valid positions) = relu(max with the padding at 0), and
                # amax needs no indices (at N = 5000 the pooling was a tenth of attention decoding)
                return torch.relu(h.masked_fill_(~valid, 0.0).amax(1))
            # ReLU after the max-pool: relu(max x) = max relu(x), on (W, Da) instead of (W, L, Da)
            # max, not amax: its backward pass routes to one index instead of comparing every value
            return torch.relu(h.masked_fill(~valid, float("-inf")).max(1).values)  # (W, Da); every entry has a token
        h = self.lstm(self.embed(ids), lengths)  # (W, L, Da), zero past each length
        return (h * valid).sum(1) / lengths[:, None]  # (W, Da)

    def token_convolution(self, ids: Tensor) -> Tensor:
        """self.conv(self.embed(ids)) as (W, L, Da), with the same parameters and values.

        A convolution of token embeddings is, at each offset k of its window, a fixed vector per
        token (conv.weight[:, :, k] times the token's embedding): a (width, V, Da) table, read
        with one-hot rows in one product. Blank (the padding) embeds to zeros, so padding with
        blank gives the convolution's zero padding. Measured on a training batch (16 lists of 100,
        1,472 distinct words, 2 threads): the phrase encoder's forward and backward pass took
        25.5 ms with nn.Conv1d over nn.Embedding (its embedding gradient scatters into V rows from
        every position), 14 ms this way.
        """
        width, pad = self.opts.width, self.opts.width // 2
        # blank's row held at zero and out of the gradient, as nn.Embedding's padding_idx keeps it
        weight = self.embed.weight.masked_fill(torch.arange(VOCAB_SIZE)[:, None] == BLANK, 0.0)  # (V, E)
        table = torch.einsum("ve,dek->kvd", weight, self.conv.weight)  # (width, V, Da)
        padded = nn.functional.pad(ids, (pad, pad), value=BLANK)  # (W, L + width - 1)
        L = ids.shape[1]
        at = torch.stack([padded[:, k:k + L] + k * VOCAB_SIZE for k in range(width)], dim=-1)  # (W, L, width)
        if not torch.is_grad_enabled():  # decoding: the width rows summed by one embedding_bag; the
            # one-hot product below writes and multiplies width x V zeros per position (5000 entries,
            # one thread: 15-19 ms that way, 3.5-7 ms this way, the same values)
            bag = nn.functional.embedding_bag(at.reshape(-1, width), table.reshape(width * VOCAB_SIZE, -1), mode="sum")
            return bag.view(*ids.shape, -1) + self.conv.bias  # (W, L, Da)
        # the lookups as one product with one-hot rows: a gather's backward pass scatters into V
        # rows from every position and was slower than the convolution it replaces
        windows = table.new_zeros(ids.shape[0], L, width * VOCAB_SIZE).scatter_(-1, at, 1.0)  # one-hot per offset
        return windows @ table.reshape(width * VOCAB_SIZE, -1) + self.conv.bias  # (W, L, Da)

    def entries(self, mem: Memory) -> tuple[Tensor, Tensor]:
        """Keys and values of each distinct list, no-bias entry first: (lists, N+1, Da) each."""
        phrases = self.encode_phrases(mem.ids, mem.lengths)  # (W, Da)
        n = mem.index.shape[0]
        values = torch.cat([self.no_bias.expand(n, 1, -1), phrases[mem.index]], dim=1)  # (lists, N+1, Da)
        return self.key(values), values

    def attend(self, query: Tensor, keys: Tensor, values: Tensor, mask: Tensor) -> tuple[Tensor, Tensor]:
        """Context (..., Da) and attention weights (..., N+1) of queries (..., Da) over entries whose
        keys and values are (N+1, Da) for all rows, (B, N+1, Da) for the queries (B, U+1, Da) of
        training, or (n, N+1, Da) per decoding row of queries (n, Da); mask (..., N+1)."""
        if keys.dim() == 2 or keys.dim() == query.dim():
            scores = query @ keys.transpose(-1, -2)  # (..., N+1)
        else:
            scores = (keys @ query[..., None])[..., 0]  # (n, N+1)
        w = torch.softmax((scores / math.sqrt(self.opts.dim)).masked_fill(~mask, float("-inf")), dim=-1)
        if values.dim() == 2 or values.dim() == w.dim():
            return w @ values, w  # (..., Da)
        return (w[..., None, :] @ values)[..., 0, :], w  # (n, Da)

    def attend_grouped(self, query: Tensor, keys: Tensor, values: Tensor, which: Tensor,
                       mask: Tensor) -> tuple[Tensor, Tensor]:
        """`attend` for decoding rows that read few lists: queries (n, Da), row r reading list
        which[r] of keys and values (lists, N+1, Da); mask (n, N+1).

        subtle: the rows are packed into a (lists, m, Da) block, m the most rows any list has, so
        one batched product per step meets each list's table once. Gathering a table per row,
        keys[which], copied n x (N+1) x Da floats at every step: at N = 5000 with a beam of 4 that
        copy, not the attention, was most of the decoding time.
        """
        L, n = keys.shape[0], query.shape[0]
        order = torch.argsort(which, stable=True)
        counts = torch.bincount(which, minlength=L)
        first = torch.cumsum(counts, 0) - counts
        slot = torch.empty_like(which)
        slot[order] = torch.arange(n) - first[which[order]]
        m = int(counts.max()) if n else 0
        packed = query.new_zeros(L, m, query.shape[-1])
        packed[which, slot] = query
        scores = torch.bmm(packed, keys.transpose(1, 2))[which, slot]  # (n, N+1)
        w = torch.softmax((scores / math.sqrt(self.opts.dim)).masked_fill(~mask, float("-inf")), dim=-1)
        spread = w.new_zeros(L, m, w.shape[-1])
        spread[which, slot] = w
        return torch.bmm(spread, values)[which, slot], w  # (n, Da), (n, N+1)

    def gate_masks(self, mem: Memory, targets: Tensor) -> tuple[Tensor, Tensor | None]:
        """Which entries may be attended to at every label position, (B, U+1, N+1) with no-bias
        first, and with next-token values each entry's next token there, (B, U+1, N) (else None)."""
        B, U = targets.shape
        N = mem.index.shape[1]
        listed = mem.valid[mem.which]  # (B, N)
        valid = torch.cat([torch.ones(B, 1, dtype=torch.bool), listed], dim=1)  # (B, N+1)
        if self.opts.phrase_gate == "all":
            return valid[:, None].expand(B, U + 1, N + 1), None
        index = mem.index[mem.which]  # (B, N)
        table, lengths = mem.ids[index], mem.lengths[index]  # (B, N, L), (B, N)
        pos, fresh = torch.zeros(B, N, dtype=torch.long), torch.ones(B, dtype=torch.bool)
        steps = [pos]
        for u in range(U):
            pos, fresh = advance_gate(pos, fresh, targets[:, u], table, lengths)
            steps.append(pos)
        pos = torch.stack(steps, dim=1)  # (B, U+1, N)
        ok = pos > 0 if self.opts.phrase_gate == "started" else pos >= 0
        mask = torch.cat([torch.ones(B, U + 1, 1, dtype=torch.bool), ok & listed[:, None]], dim=2)
        if self.opts.values != "next_token":
            return mask, None
        return mask, next_tokens(table[:, None], lengths[:, None], pos)

    def next_context(self, w: Tensor, tokens: Tensor) -> tuple[Tensor, Tensor]:
        """Context of next-token values: weights (..., N+1), no-bias first, and each entry's next
        token (..., N) -> (..., Da), and the weight on each token, (..., V). The weights are summed
        per token first (entries that continue with the same letter share one value), then embedded."""
        per_token = w.new_zeros(*w.shape[:-1], VOCAB_SIZE).scatter_add(-1, tokens, w[..., 1:])  # (..., V)
        return per_token @ self.next_embed.weight + w[..., :1] * self.no_bias, per_token

    def features(self, lists, targets, target_lens) -> dict[str, Tensor]:
        mem = Memory(lists)
        keys, values = self.entries(mem)  # (lists, N+1, Da)
        mask, nxt = self.gate_masks(mem, targets)
        out = {MASK_KEY: mask, ROW_KEY: (keys[mem.which], values[mem.which])}
        if nxt is not None:
            out[NEXT_KEY] = nxt  # (B, U+1, N)
        if self.training and self.opts.guide > 0:
            out[GUIDE_KEY] = guide_targets(lists, targets, target_lens)  # (B, U+1)
        return out

    def after_predictor(self, features: dict, pred: Tensor) -> dict:
        if self.opts.query != "predictor":
            return features
        context, w = self.attend_rows(self.query(pred), features[ROW_KEY], features[MASK_KEY])  # (..., Da)
        out = dict(features)
        if NEXT_KEY in features:
            context, out[TOKENS_KEY] = self.next_context(w, features[NEXT_KEY])
        if GUIDE_KEY in features:  # training only: the guided attention loss
            out["loss"] = self.opts.guide * guide_loss(w, features[GUIDE_KEY])
        j = self.to_joiner(context)  # (..., Dj)
        if self.training and self.opts.context_dropout > 0:  # per utterance: (B, U+1, Dj) in training
            kept = torch.rand(j.shape[0], device=j.device) >= self.opts.context_dropout
            j = j * kept.view(-1, *([1] * (j.dim() - 1)))
        out["joiner"] = j if features.get("joiner") is None else features["joiner"] + j
        return out

    def after_encoder(self, features: dict, enc: Tensor, enc_lens: Tensor) -> dict:
        if self.opts.query != "encoder":
            return features
        keys, values = features[ROW_KEY]  # (B, N+1, Da)
        mask = features[MASK_KEY][:, :1].expand(-1, enc.shape[1], -1)  # (B, T', N+1), no gate with this query
        return {**features, "encoder": self.frame_context(enc, keys, values, mask)}

    def attend_rows(self, query: Tensor, rows: tuple, mask: Tensor) -> tuple[Tensor, Tensor]:
        """Attention of queries over a ROW_KEY feature: (keys, values) per row or shared, or
        (keys, values, which) per list with each row's list (decoding)."""
        if len(rows) == 3:
            return self.attend_grouped(query, *rows, mask)
        return self.attend(query, *rows, mask)

    def frame_context(self, enc: Tensor, keys: Tensor, values: Tensor, mask: Tensor) -> Tensor:
        """The encoder-side feature (B, T', Dj) of encoder outputs (B, T', De)."""
        context, _ = self.attend(self.query(enc), keys, values, mask)  # (B, T', Da)
        return self.to_joiner(context)

    def decoder(self, lists) -> "AttentionBiaser":
        return AttentionBiaser(self, lists)



class AttentionBiaser(Biaser):
    """Per row: its place in the rows given to `decoder` (which list it reads) and, with a phrase
    gate, each entry's match position and whether the row is at a word start."""

    def __init__(self, module: ListAttention, lists: list[list[str]]):
        self.module, self.mem = module, Memory(lists)
        self.keys, self.values = module.entries(self.mem)  # (lists, N+1, Da): once per list, reused every step
        self.shared = self.keys.shape[0] == 1
        if self.shared:  # one list for every row: attend to one table
            self.keys, self.values = self.keys[0], self.values[0]
        self.gated = module.opts.phrase_gate != "all"
        if self.gated:
            index = self.mem.index[self.mem.which]  # (R, N)
            self.table, self.lengths = self.mem.ids[index], self.mem.lengths[index]  # (R, N, L), (R, N)
            self.first = self.table[..., 0]  # (R, N)

    def start(self, B: int):
        rows = torch.arange(B)
        if not self.gated:
            return (rows,)
        return rows, torch.zeros(B, self.mem.index.shape[1], dtype=torch.long), torch.ones(B, dtype=torch.bool)

    def advance(self, state, tokens: Tensor, emit: Tensor):
        if not self.gated:
            return state
        rows, pos, fresh = state
        new_pos, new_fresh = advance_gate(pos, fresh, tokens, None, self.lengths[rows], at=self.token_at(rows, pos),
                                          first=self.first[rows])
        return rows, torch.where(emit[:, None], new_pos, pos), torch.where(emit, new_fresh, fresh)

    def token_at(self, rows: Tensor, pos: Tensor) -> Tensor:
        return tokens_at(self.table, rows, pos)

    def features(self, state) -> dict:
        rows = state[0]
        which = self.mem.which[rows]  # (n,)
        valid = torch.cat([torch.ones(len(rows), 1, dtype=torch.bool), self.mem.valid[which]], dim=1)  # (n, N+1)
        out = {MASK_KEY: valid}
        if self.gated:
            pos = state[1]
            ok = pos > 0 if self.module.opts.phrase_gate == "started" else pos >= 0
            valid[:, 1:] &= ok
            if self.module.opts.values == "next_token":
                out[NEXT_KEY] = torch.where(pos >= self.lengths[rows], SPACE, self.token_at(rows, pos))  # (n, N)
        # packed per list in attend_grouped unless one list serves every row
        out[ROW_KEY] = (self.keys, self.values) if self.shared else (self.keys, self.values, which)
        return out

    def after_predictor(self, features: dict, pred: Tensor) -> dict:
        return self.module.after_predictor(features, pred)

    def frames(self, enc: Tensor) -> Tensor | None:
        if self.module.opts.query != "encoder":
            return None
        which = self.mem.which[: enc.shape[0]]  # (R,): rows in the order given to decoder()
        valid = torch.cat([torch.ones(len(which), 1, dtype=torch.bool), self.mem.valid[which]], dim=1)
        keys, values = (self.keys, self.values) if self.shared else (self.keys[which], self.values[which])
        if self.shared:  # (N+1, Da) for every row
            keys, values = keys.expand(len(which), -1, -1), values.expand(len(which), -1, -1)
        return self.module.frame_context(enc, keys, values, valid[:, None].expand(-1, enc.shape[1], -1))

    def weights(self, state, pred: Tensor) -> Tensor:
        """Attention weights (n, N+1) of each row, no-bias entry first (for pictures)."""
        f = self.features(state)
        return self.module.attend_rows(self.module.query(pred), f[ROW_KEY], f[MASK_KEY])[1]
