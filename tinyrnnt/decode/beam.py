"""Batched transducer beam search, frame by frame, with per-hypothesis biasing and boosting state.

The search (the frame-synchronous form of Graves 2012, as in time-synchronous
decoding, Saon et al., ICASSP 2020). At each encoder frame t the live set A
starts as the hypotheses kept from frame t-1. Up to `max_symbols` times:
every hypothesis in A may end the frame with blank (it joins the set D of
frame t), or emit a non-blank token; the `beam` best emissions per utterance
over all of A form the new A, keeping only those that still beat the beam-th
best of D (an emission can only lose score from there). After the last round
the remaining A end with blank too. D is then merged — hypotheses with the
same token sequence are one hypothesis whose probability is the sum over their
alignments (log-add) — and cut to `beam`.

Batching. All utterances of a batch and all `beam` slots of each are rows of
one tensor (row = utterance * beam + slot): one joiner call and one predictor
step per round for all live hypotheses. Utterances are sorted by encoder length,
so at frame t the live utterances are a prefix of the rows and finished ones
drop out. Each row carries its predictor state, output and joiner-side vector (so a
prefix's predictor step runs once and is reused by every extension), its
biasing-input state (the trie node), its boosting-scorer state, its tokens and
a 64-bit rolling hash of them (equal hashes and lengths = the same sequence;
a collision is about 1 in 10^18).

Shallow fusion (tinyrnnt.bias.fusion.Booster) adds its per-token bonus to the
emission scores, and one final boundary bonus at the end of the utterance; the
bonus depends only on the token sequence, so merging stays exact.
"""

from __future__ import annotations

from dataclasses import dataclass

import torch
from torch import Tensor

from tinyrnnt.text import BLANK

NEG = float("-inf")
_HASH_MUL = 1_000_003


@dataclass
class _Rows:
    """Hypothesis rows: score (n,), predictor state, predictor output (n, Dp), joiner-side vector
    (n, Dj), token feature (n, V) or None, biaser state, booster state, tokens (n, L), lengths (n,),
    hashes (n,)."""

    score: Tensor
    pstate: object
    pred: Tensor
    label: Tensor
    tokfeat: Tensor | None
    bstate: object
    ustate: object
    tokens: Tensor
    length: Tensor
    hash: Tensor


class _Search:
    def __init__(self, model, biaser, booster, K: int):
        self.model, self.biaser, self.booster, self.K = model, biaser, booster, K
        # (prefix hash, length, utterance) -> row of preds / states. subtle: the utterance is part of
        # the key because a biasing input's predictor feature depends on the utterance's list.
        self.cache: dict[tuple[int, int, int], int] = {}
        self.preds, self.states = None, None

    def take(self, r: _Rows, index: Tensor, score: Tensor | None = None) -> _Rows:
        m = self.model
        return _Rows(
            r.score.index_select(0, index) if score is None else score,
            m.predictor.select_state(r.pstate, index),
            r.pred.index_select(0, index),
            r.label.index_select(0, index),
            None if r.tokfeat is None else r.tokfeat.index_select(0, index),
            None if self.biaser is None else self.biaser.select(r.bstate, index),
            None if self.booster is None else r.ustate.select(index),
            r.tokens.index_select(0, index), r.length.index_select(0, index), r.hash.index_select(0, index))

    def cat(self, parts: list[_Rows]) -> _Rows:
        from tinyrnnt.bias.fusion import BoostState

        width = max(p.tokens.shape[1] for p in parts)
        return _Rows(
            torch.cat([p.score for p in parts]),
            self.model.predictor.cat_states([p.pstate for p in parts]),
            torch.cat([p.pred for p in parts]),
            torch.cat([p.label for p in parts]),
            None if parts[0].tokfeat is None else torch.cat([p.tokfeat for p in parts]),
            None if self.biaser is None else self.biaser.cat([p.bstate for p in parts]),
            None if self.booster is None else BoostState.cat([p.ustate for p in parts]),
            torch.cat([torch.nn.functional.pad(p.tokens, (0, width - p.tokens.shape[1])) for p in parts]),
            torch.cat([p.length for p in parts]), torch.cat([p.hash for p in parts]))

    def step(self, r: _Rows, tokens: Tensor) -> _Rows:
        """Rows after emitting `tokens` (n,): predictor, biaser and booster advance once per row."""
        m, n = self.model, len(tokens)
        if r.tokens.shape[1] <= int(r.length.max()):
            r.tokens = torch.nn.functional.pad(r.tokens, (0, max(8, r.tokens.shape[1])))
        seq = r.tokens.clone()
        seq[torch.arange(n), r.length] = tokens
        extra, bstate = {}, None
        if self.biaser is not None:
            bstate = self.biaser.advance(r.bstate, tokens, torch.ones(n, dtype=torch.bool))
            extra = self.biaser.features(bstate)
        pe = extra.get("predictor")
        new_hash, new_len = r.hash * _HASH_MUL + tokens, r.length + 1
        # The predictor (the costly part) runs once per new prefix: for live rows whose prefix no
        # earlier step computed (the same hypothesis extended by the same token at the next
        # frame is common); dead rows keep their parent's state.
        live = torch.nonzero(torch.isfinite(r.score))[:, 0].tolist()
        keys = list(zip(new_hash.tolist(), new_len.tolist(), (torch.arange(n) // self.K).tolist()))
        hit = [i for i in live if keys[i] in self.cache]
        miss = [i for i in live if keys[i] not in self.cache]
        pred, pstate = r.pred.clone(), r.pstate  # dead rows keep their parent's
        if miss:
            idx = torch.tensor(miss)
            sub = m.predictor.select_state(r.pstate, idx)
            out, new = m.predictor.step(tokens[idx, None], sub, None if pe is None else pe[idx, None])
            pred[idx] = out[:, 0]
            pstate = m.predictor.put_state(pstate, idx, new)
            self.store([keys[i] for i in miss], new, out[:, 0])
        if hit:
            idx = torch.tensor(hit)
            rows = torch.tensor([self.cache[keys[i]] for i in hit])
            pred[idx] = self.preds.index_select(0, rows)
            pstate = m.predictor.put_state(pstate, idx, m.predictor.select_state(self.states, rows))
        if self.biaser is not None:
            extra = self.biaser.after_predictor(extra, pred)
        label = m.joiner.label_side(pred, extra.get("joiner"))  # (n, Dj)
        ustate = None if self.booster is None else self.booster.advance(r.ustate, tokens)
        return _Rows(r.score, pstate, pred, label, extra.get("logits"), bstate, ustate, seq, new_len, new_hash)

    def store(self, keys: list, state, out: Tensor) -> None:
        """Keep predictor states and outputs of new prefixes, by (hash, length, utterance), in
        buffers that double when full."""
        pred, n = self.model.predictor, out.shape[0]
        if self.preds is None:
            self.preds, self.states, self.used = out.clone(), pred.cat_states([state]), 0
        elif self.used + n > self.preds.shape[0]:
            while self.used + n > self.preds.shape[0]:
                self.preds = torch.cat([self.preds, torch.zeros_like(self.preds)])
                self.states = pred.cat_states([self.states, self.states])  # the new half is overwritten
        idx = torch.arange(self.used, self.used + n)
        self.preds[idx] = out
        pred.put_state(self.states, idx, state, inplace=True)
        for k, key in enumerate(keys):
            self.cache[key] = self.used + k
        self.used += n


@torch.no_grad()
def beam_search(model, feats: Tensor, feat_lens: Tensor, lists: list[list[str]] | None = None, beam: int = 4,
                max_symbols: int = 4, boost: dict | None = None,
                spotting: bool = False) -> list[list[tuple[list[int], float]]]:
    """N-best lists per utterance: [(token ids, score), ...] best first, at most `beam` each.

    lists: one biasing list per utterance (the model's biasing input and the booster read it).
    boost: shallow fusion, {"weight": w, "where": "anywhere" | "after_trigger",
    "classes": per utterance the class of each list entry, "triggers": class -> phrases};
    None = no booster at all (weight 0 gives the same scores, exactly).
    spotting: keyword spotting steers the trie's mixing boost (tinyrnnt.bias.spotting).
    """
    from tinyrnnt.bias.fusion import Booster

    if beam < 1 or max_symbols < 1:
        raise ValueError(f"beam and max_symbols must be >= 1, got {beam} and {max_symbols}")
    K = beam
    enc, enc_lens, *first = (model.encoder(feats, feat_lens, keep_first=True) if spotting
                             else model.encoder(feats, feat_lens))  # (B, T', De)
    B = enc.shape[0]
    lists = [[] for _ in range(B)] if lists is None else lists
    order = torch.argsort(enc_lens, descending=True, stable=True)
    enc_p = model.joiner.enc_proj(enc.index_select(0, order))  # (B, T', Dj)
    lens = enc_lens.index_select(0, order).tolist()
    row_lists = [lists[int(b)] for b in order for _ in range(K)]  # rows of an utterance share its list
    biaser = model.bias.decoder(row_lists) if model.bias is not None and not spotting else None
    if spotting:
        from tinyrnnt.bias.spotting import ctc_log_probs, spotting_decoder

        biaser = spotting_decoder(model, row_lists)
        biaser.hear(ctc_log_probs(model, first[0].index_select(0, order)), first[1].index_select(0, order),
                    torch.arange(B).repeat_interleave(K), enc.shape[1])
    booster = None
    if boost is not None:
        classes = boost.get("classes")
        row_classes = [classes[int(b)] for b in order for _ in range(K)] if classes is not None else None
        booster = Booster(row_lists, boost.get("weight", 0.0), boost.get("where", "anywhere"), row_classes,
                          boost.get("triggers"))
    search = _Search(model, biaser, booster, K)
    frames = biaser.frames(enc.index_select(0, order).repeat_interleave(K, dim=0)) if biaser is not None else None

    R = B * K
    score = torch.full((R,), NEG)
    score[::K] = 0.0
    start = torch.full((R,), BLANK, dtype=torch.long)
    extra, bstate = {}, None
    if biaser is not None:
        bstate = biaser.start(R)
        extra = biaser.features(bstate)
    pe = extra.get("predictor")
    pred, pstate = model.predictor.step(start[:, None], None, None if pe is None else pe[:, None])
    pred = pred[:, 0]  # (R, Dp)
    if biaser is not None:
        extra = biaser.after_predictor(extra, pred)
    rows = _Rows(score, pstate, pred, model.joiner.label_side(pred, extra.get("joiner")), extra.get("logits"),
                 bstate, booster.start() if booster is not None else None,
                 torch.zeros((R, 8), dtype=torch.long), torch.zeros(R, dtype=torch.long),
                 torch.zeros(R, dtype=torch.long))
    finished: dict[int, _Rows] = {}
    live = B
    for t in range(max(lens) if lens else 0):
        now = sum(1 for n in lens if n > t)
        if now < live:  # utterances now..live-1 are done: keep their rows aside
            for u in range(now, live):
                finished[u] = search.take(rows, torch.arange(u * K, (u + 1) * K))
            rows = search.take(rows, torch.arange(now * K))
            live = now
        if biaser is not None and biaser.set_frame(t):  # features that read the frame: read them again
            rows.tokfeat = biaser.after_predictor(biaser.features(rows.bstate), rows.pred).get("logits")
        enc_rows = enc_p[:live, t].repeat_interleave(K, dim=0)  # (live*K, Dj)
        if frames is not None:  # (R, T', Dj): a biasing feature per frame and row
            enc_rows = enc_rows + frames[: live * K, t]
        rows = _frame(search, rows, enc_rows, live, K, max_symbols)
    for u in range(live):
        finished[u] = search.take(rows, torch.arange(u * K, (u + 1) * K))

    out: list[list[tuple[list[int], float]]] = [[] for _ in range(B)]
    for u, r in finished.items():
        final = r.score + (booster.final(r.ustate) if booster is not None else 0.0)
        ranked = torch.argsort(final, descending=True, stable=True).tolist()
        out[int(order[u])] = [(r.tokens[k, : int(r.length[k])].tolist(), float(final[k]))
                              for k in ranked if final[k] > NEG]
    return out


def _frame(search: _Search, rows: _Rows, enc_rows: Tensor, U: int, K: int, max_symbols: int) -> _Rows:
    """One encoder frame for U utterances (rows U*K, their encoder sides enc_rows (U*K, Dj)): expand,
    end with blank, merge, keep K."""
    m, booster = search.model, search.booster
    ends: list[_Rows] = []
    a = rows
    for s in range(max_symbols + 1):
        hidden = torch.tanh(enc_rows + a.label)
        lp = torch.log_softmax(m.token_logits(hidden, a.tokfeat), dim=-1)  # (U*K, V)
        ends.append(_Rows(a.score + lp[:, BLANK], *_rest(a)))
        if s == max_symbols:
            break
        cand = a.score[:, None] + lp
        if booster is not None:
            cand = cand + booster.deltas(a.ustate)
        cand[:, BLANK] = NEG
        V = cand.shape[1]
        top, idx = cand.view(U, K * V).topk(K, dim=1)  # (U, K)
        ended = torch.stack([e.score.view(U, K) for e in ends], 1).view(U, -1)  # (U, K * rounds)
        kth = ended.topk(K, dim=1).values[:, -1:]  # beam-th best ending so far
        top = torch.where(top > kth, top, torch.full_like(top, NEG))
        if not torch.isfinite(top).any():
            break
        parent = (torch.arange(U)[:, None] * K + idx // V).view(-1)
        tokens = (idx % V).view(-1)
        a = search.step(search.take(a, parent, top.view(-1)), tokens)
    # merge equal sequences among the endings, keep the K best per utterance
    n = len(ends)
    score = torch.stack([e.score.view(U, K) for e in ends], 1).view(U, n * K)  # column = round * K + slot
    key = torch.stack([e.hash.view(U, K) for e in ends], 1).view(U, n * K)
    length = torch.stack([e.length.view(U, K) for e in ends], 1).view(U, n * K)
    alive = torch.isfinite(score)
    same = (key[:, :, None] == key[:, None, :]) & (length[:, :, None] == length[:, None, :])
    same &= alive[:, :, None] & alive[:, None, :]
    merged = torch.logsumexp(torch.where(same, score[:, None, :], torch.full_like(same, NEG, dtype=score.dtype)), -1)
    earlier = torch.ones(n * K, n * K, dtype=torch.bool).tril(-1)  # j < i
    first = ~(same & earlier).any(-1)
    merged = torch.where(alive & first, merged, torch.full_like(merged, NEG))
    best, col = merged.topk(K, dim=1)  # (U, K)
    total = U * K
    index = ((col // K) * total + torch.arange(U)[:, None] * K + col % K).view(-1)
    return search.take(search.cat(ends), index, best.view(-1))


def _rest(r: _Rows):
    return r.pstate, r.pred, r.label, r.tokfeat, r.bstate, r.ustate, r.tokens, r.length, r.hash
