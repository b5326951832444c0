"""Keyword spotting steers the trie's mixing boost while decoding (`decode.spotting`).

Greedy decoding picks a name's first letter from what the model hears at that
moment; with a hundred listed entries the prefix tree allows nearly every first
letter, so the tree cannot say which one, and a wrong first letter sends the
search down another entry. The model's own scores of whole entries know more:
scored as whole words, the control model ranks the spoken name first among 100
entries for nearly every name of the seen styles (README, "What the benchmarks
measured"). This module puts that whole-word evidence where the choice is made.

Before the search, every list entry is spotted in the utterance with the
model's auxiliary CTC head (on the first encoder layer; trained in every arm,
`model.ctc_weight`): for every start frame t0 and entry e, the best CTC path
(Viterbi) that spells e from t0 on, in log-probability above the best
unconstrained path over the same frames (a log-likelihood ratio against a free
"filler" path, as CTC keyword spotting usually scores a keyword; common
practice, written from memory), ending wherever it scores best. One backward
pass over the frames gives every start at once: (frames x entries x CTC
states), no loop over spans.

While decoding, a hypothesis at a word start reads the scores of spans starting
near its frame (the CTC frame rate is `model.stack_after_first` times the
transducer's, plus REACH frames each side); inside a word it keeps the scores
of the frame where the word began. The entries that the partial word still
matches get softmax weights of their scores, and the trie's mixing target
(`boost_mode: mix_heard`: the model's own choice among the allowed tokens,
tinyrnnt.bias.trie_cue.heard_mix_correction) is multiplied by the weight of
the entries continuing with each token (plus FLOOR): t_v proportional to
q_v ** s * (P_v + FLOOR) on the allowed tokens. The gate, blank and the
tokens the tree does not allow are untouched: where the hypothesis could be
following a heard entry, spotting only says which allowed letter. Where it
could follow none (every entry its partial word still matches was heard
nowhere in the utterance, below HEARD_FLOOR, or cannot start near its frame),
the boost is off for that step: the list does not push a hypothesis along
entries the audio does not hold. Nothing is trained; an empty list changes
nothing. Our own combination of published parts.

The entries the partial word still matches are the entries under the
hypothesis's prefix-tree node, so the weights need no per-entry work while
decoding: hear() sums the heard entries' exp(score) under every tree node on
their paths, per frame (log-sum-exp, one scatter), and a hypothesis at node x
reads the share of each child's sum in x's (and of the entries ending at x,
for the space): a few lookups per row and step, whatever the list size.
"""

from __future__ import annotations

import torch
from torch import Tensor, nn

from tinyrnnt.bias.attention import Memory
from tinyrnnt.bias.base import Biaser
from tinyrnnt.text import BLANK, SPACE

REACH = 2  # CTC frames on each side of a transducer frame whose span starts count for it
FLOOR = 1e-3  # share every allowed token keeps in the spotted mixing target
NEG = -1e30
CHUNKS = 4  # entries are scored in this many groups of similar length (fewer states for the short)
BLOCK = 16  # frames whose letter scores are gathered at once (memory: B x BLOCK x entries x letters)
# An entry whose best score anywhere in the utterance is below this (nats under the best free path) is
# not heard at all: it is dropped from the steering, so a hypothesis following only such entries gets no
# boost, rather than one steered among entries the model never heard. With 3,300-entry
# sounds-like lists this keeps at most ~250 of an utterance's entries (valid, trie arm of record,
# 2026-12-03: 2.6 % of them), so the tables of node sums stay small.
HEARD_FLOOR = -20.0
# Where no entry the hypothesis could be following is heard, the boost is off (above). This was
# chosen on valid, trie arm of record, N = 100 (2026-12-03): greedy WER 0.1001 against 0.1017
# with the unsteered boost left on there; beam 4 with sounds-like lists 0.0676 against 0.0754.
CANNOT = -1e9  # a span score at or below this: the entry cannot start near the frame


def spot_starts(logp: Tensor, lens: Tensor, ids: Tensor, id_lens: Tensor, chunks: int = CHUNKS) -> Tensor:
    """`_spot` over groups of entries of similar length: each group's states stop at its longest
    entry, so lists of many short spellings and a few long ones cost less. Same values as one
    group (tests/test_spotting.py)."""
    B, N = id_lens.shape
    if chunks <= 1 or N < 2 * chunks:
        return _spot(logp, lens, ids, id_lens)
    order = torch.argsort(id_lens, dim=1, stable=True)  # (B, N) shortest first, per row
    ids_sorted = ids.gather(1, order[..., None].expand_as(ids))
    lens_sorted = id_lens.gather(1, order)
    parts, size = [], -(-N // chunks)
    for lo in range(0, N, size):
        hi = min(N, lo + size)
        L = max(int(lens_sorted[:, lo:hi].max()), 1)
        parts.append(_spot(logp, lens, ids_sorted[:, lo:hi, :L], lens_sorted[:, lo:hi]))
    out = torch.empty(B, logp.shape[1], N)
    out.scatter_(2, order[:, None, :].expand(-1, logp.shape[1], -1), torch.cat(parts, 2))
    return out


def _spot(logp: Tensor, lens: Tensor, ids: Tensor, id_lens: Tensor) -> Tensor:
    """Best spotting score of each entry from each start frame: logp (B, T, V) CTC log-probs with
    blank = tinyrnnt.text.BLANK, lens (B,) frames, ids (B, N, L) each row's entries padded,
    id_lens (B, N) their lengths (0 = no entry) -> (B, T, N).

    Score of a span: its best CTC path spelling the entry (blanks around and between letters,
    a doubled letter needs a blank between) minus the best unconstrained path over the same
    frames, so it is <= 0 and 0 where the entry is what the model hears best. Frames past a
    row's length, and entries of length 0, score NEG.

    >>> lp = torch.log(torch.tensor([[[0.1, 0.9, 0.0], [0.8, 0.1, 0.1]]]).clamp_min(1e-9))  # blank, a, b
    >>> s = _spot(lp, torch.tensor([2]), torch.tensor([[[1], [2]]]), torch.tensor([[1, 1]]))
    >>> [round(x, 3) for x in s[0, 0].tolist()]  # "a" is heard best; "b" best as blank, then "b"
    [0.0, -4.277]
    """
    B, T, V = logp.shape
    N, L = ids.shape[1], ids.shape[2]
    best_free = logp.max(-1).values  # (B, T)
    rel = logp - best_free[..., None]  # (B, T, V), <= 0
    rel = rel.masked_fill(torch.arange(T)[None, :, None] >= lens[:, None, None], NEG)  # frames past a row's length
    blank = rel[:, :, BLANK].contiguous()  # (B, T)
    # The CTC states of an entry, blank and letter states apart (both contiguous): blank k (before
    # letter k; k = length: after the last) and letter k. Going backwards, a state draws on itself,
    # the next state, and letter k on letter k + 1 when that letter differs (a doubled letter needs a
    # blank between). States past an entry's end draw only on each other and stay at NEG or below.
    k = torch.arange(L)[None, None, :]
    skip = torch.where((ids[:, :, 1:] != ids[:, :, :-1]) & (k[..., 1:] < id_lens[..., None]), 0.0, NEG)  # (B, N, L-1)
    # a span may end after the last letter or the blank after it: every score is <= 0, so there a
    # maximum with 0 (with NEG elsewhere: changes nothing)
    stop_letter = torch.where(k == id_lens[..., None] - 1, 0.0, NEG)  # (B, N, L)
    stop_blank = torch.where((torch.arange(L + 1)[None, None, :] == id_lens[..., None]) & (id_lens[..., None] > 0),
                             0.0, NEG)  # (B, N, L + 1)
    flat = ids.reshape(B, 1, N * L)
    blanks = torch.full((B, N, L + 1), NEG)  # best from frame t+1 on, having reached the state at t
    letters = torch.full((B, N, L), NEG)
    new_blanks, new_letters = torch.empty_like(blanks), torch.empty_like(letters)  # buffers reused at every frame
    skipped = torch.empty(B, N, max(L - 1, 0))
    out = torch.full((T, B, N), NEG)  # frame first: each frame's scores are written in one piece
    for t in range(T - 1, -1, -1):
        if t == T - 1 or (t + 1) % BLOCK == 0:  # the letters' frame scores, BLOCK frames in one gather
            lo = t - t % BLOCK
            emit = rel[:, lo:t + 1].gather(2, flat.expand(B, t + 1 - lo, N * L)).view(B, t + 1 - lo, N, L)
        torch.maximum(blanks, stop_blank, out=new_blanks)
        torch.maximum(new_blanks[..., :L], letters, out=new_blanks[..., :L])
        torch.maximum(letters, stop_letter, out=new_letters)
        torch.maximum(new_letters, blanks[..., 1:], out=new_letters)
        torch.maximum(new_letters[..., :-1], torch.add(letters[..., 1:], skip, out=skipped), out=new_letters[..., :-1])
        blanks, new_blanks = new_blanks.add_(blank[:, t, None, None]), blanks
        letters, new_letters = new_letters.add_(emit[:, t - lo]), letters
        torch.maximum(blanks[..., 0], letters[..., 0], out=out[t])
    out = out.transpose(0, 1).clamp_min(NEG)  # sums of penalties stay below NEG: one value for "cannot"
    return out.masked_fill(~(id_lens > 0)[:, None, :], NEG)


def frame_scores(starts: Tensor, ratio: int, frames: int, reach: int = REACH) -> Tensor:
    """Per transducer frame t, each entry's best score over CTC start frames
    ratio*t - reach .. ratio*t + ratio - 1 + reach: starts (B, T1, N) -> (B, frames, N).

    >>> frame_scores(torch.tensor([[[0.], [1.], [2.], [3.], [4.]]]), 2, 3, reach=0)[0, :, 0].tolist()
    [1.0, 3.0, 4.0]
    """
    B, T1, N = starts.shape
    x = starts.transpose(1, 2)  # (B, N, T1)
    need = frames * ratio + reach  # frames read up to the last window's end
    x = nn.functional.pad(x, (reach, max(need - T1, 0)), value=NEG)
    win = x.unfold(2, ratio + 2 * reach, ratio)[:, :, :frames].amax(-1)  # (B, N, frames)
    return win.transpose(1, 2)


class SpottingBiaser(Biaser):
    """Wraps the decode-time state of a biasing input whose token boost is the trie's heard mixing
    boost (a TrieBiaser, or a BothBiaser whose first part is one); state: (inner state, row,
    frame where the current word began)."""

    listens = True  # the decoders call hear() with the CTC head's log-probabilities first

    def __init__(self, inner: Biaser, lists: list[list[str]], ratio: int):
        self.inner, self.ratio = inner, ratio
        self.tree = inner.trie if hasattr(inner, "trie") else inner  # the part whose state is the tree node
        self.trees = self.tree.trees  # BatchedTrees, one tree per row
        self.mem = Memory(lists)
        self.index = self.mem.index[self.mem.which]  # (R, N) each row's entries among the distinct words
        self.lengths = self.mem.lengths[self.index] * self.mem.valid[self.mem.which]  # (R, N)
        self.frame, self.utt, self.mass = 0, None, None

    def hear(self, logp: Tensor, lens: Tensor, utt_of_row: Tensor, frames: int):
        """CTC log-probs (U, T1, V) of the utterances and their lengths (U,); utt_of_row (R,): the
        utterance of each row given to the constructor (rows of one utterance share its list)."""
        first = self._first_rows(utt_of_row, logp.shape[0])
        starts = spot_starts(logp, lens, self.mem.ids[self.index[first]], self.lengths[first])  # (U, T1, N)
        self.use_scores(frame_scores(starts, self.ratio, frames), utt_of_row)

    @staticmethod
    def _first_rows(utt_of_row: Tensor, U: int) -> Tensor:
        R = len(utt_of_row)
        return torch.full((U,), R - 1).scatter_reduce_(0, utt_of_row, torch.arange(R), "amin")  # (U,)

    def use_scores(self, scores: Tensor, utt_of_row: Tensor) -> None:
        """Steer by spotting scores (U, T', N) of each utterance's entries (in list order) at each
        transducer frame: hear()'s, or a spotter's of your own. Entries below HEARD_FLOOR at every
        frame are left out; per frame, the log-sum-exp of the kept entries' scores under every tree
        node on their paths (`mass`, (T', C + 1): C columns of (utterance, node), the last one NEG
        for nodes no kept entry passes) and of those ending there (`ending`)."""
        U = scores.shape[0]
        first = self._first_rows(utt_of_row, U)
        lengths = self.lengths[first]  # (U, N)
        u, e = torch.nonzero((scores.amax(1) > HEARD_FLOOR) & (lengths > 0), as_tuple=True)  # the kept entries
        ids, lengths = self.mem.ids[self.index[first[u], e]], lengths[u, e]  # (H, L), (H,)
        roots = self.trees.offsets[first]  # (U,) each utterance's tree root (global node ids)
        L = ids.shape[1]
        path = torch.empty(len(u), L + 1, dtype=torch.long)  # each entry's nodes: the root, then after each letter
        node = path[:, 0] = roots[u]
        for d in range(L):
            node = self.trees.child[node, ids[:, d]].long()  # -1 stays -1 (the dead row)
            path[:, d + 1] = node
        h, d = torch.nonzero((torch.arange(L + 1) <= lengths[:, None]) & (path >= 0), as_tuple=True)
        u, e = u[h], e[h]
        local = path[h, d] - roots[u]  # node ids within the utterance's tree
        M = int(local.max()) + 1 if len(local) else 1
        keys, column = torch.unique(u * M + local, return_inverse=True)
        C = len(keys)
        self.column = torch.full((U, M), C)  # (U, M) column of each (utterance, local node)
        self.column[keys // M, keys % M] = torch.arange(C)
        src = scores[u, :, e].T  # (T', P) the entry's score at each frame, once per node on its path
        self.mass = _scatter_logsumexp(src, column, C + 1)
        ends = d == lengths[h]
        self.ending = _scatter_logsumexp(src[:, ends], column[ends], C + 1)
        self.roots, self.M, self.C, self.utt = roots, M, C, utt_of_row

    def set_frame(self, t: int) -> bool:
        self.frame = t
        return True

    def select(self, state, index: Tensor):
        return (self.inner.select(state[0], index), *(s.index_select(0, index) for s in state[1:]))

    def cat(self, states: list):
        return (self.inner.cat([s[0] for s in states]), *(torch.cat(parts) for parts in zip(*(s[1:] for s in states))))

    def start(self, B: int):
        return self.inner.start(B), torch.arange(B), torch.zeros(B, dtype=torch.long)

    def advance(self, state, tokens: Tensor, emit: Tensor):
        inner, rows, began = state
        fresh = self.trees.is_root[self._nodes(inner)]  # at a word start: the word begins here if it emits
        began = torch.where(emit & fresh, torch.full_like(began, self.frame), began)
        return self.inner.advance(inner, tokens, emit), rows, began

    def _nodes(self, inner) -> Tensor:
        return inner[0] if self.tree is not self.inner else inner

    def features(self, state) -> dict:
        inner, rows, began = state
        out = dict(self.inner.features(inner))
        cue = out.get("logits")
        if cue is None or self.mass is None:
            return out
        nodes = self._nodes(inner)
        frame = torch.where(self.trees.is_root[nodes], torch.full_like(began, self.frame), began)
        out["logits"] = cue * self.weights(nodes, self.utt[rows], frame.clamp(max=self.mass.shape[0] - 1))
        return out  # an all-zero cue: no boost for the row

    def weights(self, nodes: Tensor, utt: Tensor, frame: Tensor) -> Tensor:
        """The cue's multiplier (n, V) of rows at tree nodes (n,) of utterances (n,), at frames (n,):
        each token's softmax weight over the kept entries under the node (their scores at the
        frame), by the child the token leads to (the space: entries ending at the node), plus
        FLOOR; all zero where no kept entry is under the node (the boost off)."""
        roots = self.roots[utt]
        here = self._columns(nodes, roots, utt)  # (n,)
        kids = self._columns(self.trees.child[nodes].long(), roots[:, None], utt[:, None])  # (n, V)
        total = self.mass[frame, here]  # (n,)
        share = torch.exp(self.mass[frame[:, None], kids] - total[:, None])  # (n, V)
        share[:, SPACE] = torch.exp(self.ending[frame, here] - total)
        heard = total > CANNOT  # a kept entry the hypothesis could be following
        return (share + FLOOR) * heard[:, None]

    def _columns(self, nodes: Tensor, roots: Tensor, utt: Tensor) -> Tensor:
        local = nodes - roots
        ok = (nodes >= 0) & (local >= 0) & (local < self.M)
        return torch.where(ok, self.column[utt, local.clamp(0, self.M - 1)], self.C)

    def after_predictor(self, features: dict, pred: Tensor) -> dict:
        return self.inner.after_predictor(features, pred)

    def frames(self, enc: Tensor) -> Tensor | None:
        return self.inner.frames(enc)


def _scatter_logsumexp(src: Tensor, index: Tensor, size: int) -> Tensor:
    """log sum exp of src (T, P) into `size` columns by index (P,) -> (T, size); NEG for columns
    nothing reaches.

    >>> _scatter_logsumexp(torch.tensor([[0.0, 0.0, 1.0]]), torch.tensor([1, 1, 0]), 3).tolist()[0][:2]
    [1.0, 0.6931471824645996]
    """
    T = src.shape[0]
    idx = index[None, :].expand(T, -1)
    top = torch.full((T, size), NEG).scatter_reduce_(1, idx, src, "amax")
    total = torch.zeros(T, size).scatter_add_(1, idx, torch.exp(src - top.gather(1, idx)))
    return torch.where(total > 0, top + torch.log(total), torch.full_like(top, NEG))


def can_spot(model) -> bool:
    """Whether decode.spotting applies: a heard mixing boost to steer and a CTC head to spot with."""
    return _missing(model) is None


def _missing(model) -> str | None:
    """What keeps `model` from spotting, as an error message, or None."""
    bias = model.bias
    if bias is None or not bias.cfg.token_boost or bias.cfg.boost_mode != "mix_heard":
        return ("decode.spotting steers the trie's mixing boost: it needs a model trained with "
                "bias.token_boost: true and bias.boost_mode: mix_heard")
    if model.ctc_head is None:
        return ("decode.spotting spots list entries with the model's CTC head: it needs a model "
                "trained with model.ctc_weight > 0")
    return None


def spotting_decoder(model, lists: list[list[str]]) -> SpottingBiaser:
    """The model's biaser for `lists`, steered by spotting; ConfigError (a ValueError) naming the
    setting when the model cannot spot (no CTC head) or has no heard mixing boost to steer."""
    from tinyrnnt.config import ConfigError

    missing = _missing(model)
    if missing is not None:
        raise ConfigError(missing)
    return SpottingBiaser(model.bias.decoder(lists), lists, model.cfg.stack_after_first)


def ctc_log_probs(model, first: Tensor) -> Tensor:
    """Log-probabilities (B, T1, V) of the CTC head over the first encoder layer's output."""
    return torch.log_softmax(model.ctc_head(first), dim=-1)
