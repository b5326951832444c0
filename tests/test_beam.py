"""Beam search (tinyrnnt.decode.beam) against exhaustive search, greedy decoding and torchaudio.

Reference for the last check: torchaudio.models.RNNTBeamSearch (a registry library), run
through tinyrnnt.decode.reference on the same model.
"""

import itertools
from collections import defaultdict

import pytest
import torch

from tinyrnnt.decode.beam import beam_search
from tinyrnnt.decode.greedy import greedy_decode
from tinyrnnt.model.transducer import ModelConfig, Transducer
from tinyrnnt.text import VOCAB_SIZE

CFG = ModelConfig(feature_bins=8, encoder_dim=16, encoder_layers=2, predictor_dim=16, predictor_embed=8,
                  joiner_dim=16, dropout=0.0, ctc_weight=0)


def small_model(seed, allowed=None, blank_bias=0.0, scale=4.0):
    torch.manual_seed(seed)
    m = Transducer(CFG).eval()
    with torch.no_grad():
        m.joiner.out.weight.mul_(scale)
        if allowed is not None:  # a tiny inventory: every other token is out of reach
            m.joiner.out.bias[:] = -1e4
            m.joiner.out.bias[list(allowed)] = 0.5
        else:
            m.joiner.out.bias[1:] = torch.randn(VOCAB_SIZE - 1) * 2
        m.joiner.out.bias[0] = blank_bias
    return m


def path_logprob(m, enc, frames):
    """log P of one alignment: per frame, its tokens, then blank."""
    total = 0.0
    pred, state = m.predictor.step(torch.tensor([[0]]), None)
    for t, toks in enumerate(frames):
        for k in range(len(toks) + 1):
            h = torch.tanh(m.joiner.enc_proj(enc[:, t]) + m.joiner.pred_proj(pred[:, 0]))
            lp = torch.log_softmax(m.joiner.out(h), -1)[0]
            if k < len(toks):
                total += float(lp[toks[k]])
                pred, state = m.predictor.step(torch.tensor([[toks[k]]]), state)
            else:
                total += float(lp[0])
    return total


@pytest.mark.parametrize("seed", [0, 1])
@torch.no_grad()
def test_wide_beam_finds_the_exhaustive_best(seed):
    # Exhaustive search: every alignment over 3 frames, at most 2 tokens a frame from {a, b},
    # summed per label sequence (the transducer's P(y|x), Graves 2012); the best sequence and
    # its probability must be what a beam wide enough to prune nothing returns.
    m = small_model(seed, allowed=(3, 4))
    feats, lens = torch.randn(1, 24, 8), torch.tensor([24])
    enc, enc_lens = m.encoder(feats, lens)
    T = int(enc_lens[0])
    assert T == 3
    options = [()] + [(x,) for x in (3, 4)] + [(x, y) for x in (3, 4) for y in (3, 4)]
    per_seq = defaultdict(list)
    for path in itertools.product(options, repeat=T):
        per_seq[tuple(t for f in path for t in f)].append(path_logprob(m, enc, path))
    totals = {s: float(torch.logsumexp(torch.tensor(v), 0)) for s, v in per_seq.items()}
    best = max(totals, key=totals.get)
    found = beam_search(m, feats, lens, beam=200, max_symbols=2)[0]
    assert tuple(found[0][0]) == best
    assert found[0][1] == pytest.approx(totals[best], abs=1e-4)
    # the N-best list is the exhaustive ranking too, scores included
    ranked = sorted(totals.items(), key=lambda kv: -kv[1])[:5]
    assert [(tuple(t), round(s, 3)) for t, s in found[:5]] == [(s, round(v, 3)) for s, v in ranked]


class PeakyModel(torch.nn.Module):
    """A model where the algorithms coincide: each frame's features name at most one token, and
    after emitting a token the label side favours blank and disfavours that token again, so every
    frame emits at most one token with a clear margin (what a well-trained transducer does)."""

    bias = None

    def __init__(self):
        super().__init__()
        self.encoder = lambda feats, lens: (feats, lens)
        self.joiner = self
        self.predictor = self
        self.cfg = CFG

    def enc_proj(self, x):
        return x

    def label_side(self, pred, extra=None):
        return pred

    def step(self, tokens, state, extra=None):
        out = torch.zeros(tokens.shape[0], 1, VOCAB_SIZE)
        emitted = tokens[:, 0] != 0
        out[emitted, 0, 0] = 0.5
        out[emitted, 0, tokens[emitted, 0]] = -2.0
        return out, tokens

    def select_state(self, state, index):
        return state.index_select(0, index)

    def cat_states(self, states):
        return torch.cat(states)

    def put_state(self, state, index, rows, inplace=False):
        return state.index_copy_(0, index, rows) if inplace else state.index_copy(0, index, rows)

    def token_logits(self, hidden, feature=None):
        return 20 * hidden


@torch.no_grad()
def test_beam_one_matches_greedy_where_they_coincide():
    g = torch.Generator().manual_seed(0)
    B, T = 8, 30
    feats = torch.zeros(B, T, VOCAB_SIZE)
    for b in range(B):
        for t in range(T):
            if torch.rand((), generator=g) < 0.5:
                feats[b, t, 0] = 1.0  # a blank frame
            else:
                feats[b, t, int(torch.randint(1, VOCAB_SIZE, (), generator=g))] = 1.0
    lens = torch.tensor([T, T - 3, T - 7, T, 12, 20, T, 5])
    m = PeakyModel()
    greedy = greedy_decode(m, feats, lens)
    beam1 = [n[0][0] for n in beam_search(m, feats, lens, beam=1)]
    assert beam1 == greedy
    assert sum(map(len, greedy)) > 20  # the check is not about empty outputs


@torch.no_grad()
def test_boost_weight_zero_is_exactly_the_plain_beam_search():
    m = small_model(5, blank_bias=-2.0)
    feats, lens = torch.randn(4, 60, 8), torch.tensor([60, 41, 33, 60])
    lists = [["kell", "marra"], ["oske"], [], ["lark", "kell harbour"]]
    plain = beam_search(m, feats, lens, lists, beam=4)
    zero = beam_search(m, feats, lens, lists, beam=4, boost={"weight": 0.0, "where": "anywhere"})
    assert plain == zero


@torch.no_grad()
def test_batching_does_not_change_results():
    # the same utterance decoded alone and in a batch of other lengths: the same N-best
    m = small_model(6, blank_bias=-2.0)
    feats, lens = torch.randn(5, 50, 8), torch.tensor([50, 23, 37, 50, 11])
    lists = [["kell"], ["oske", "mara"], ["lark"], [], ["kell"]]
    boost = {"weight": 2.0, "where": "anywhere"}
    together = beam_search(m, feats, lens, lists, beam=3, boost=boost)
    for b in range(5):
        n = int(lens[b])
        alone = beam_search(m, feats[b:b + 1, :n], lens[b:b + 1], [lists[b]], beam=3, boost=boost)[0]
        assert [t for t, _ in alone] == [t for t, _ in together[b]]
        # float sums of other batch shapes differ in the last bits (about 1e-4 relative)
        assert [s for _, s in alone] == pytest.approx([s for _, s in together[b]], rel=1e-3)


@torch.no_grad()
def test_same_best_as_torchaudio_rnnt_beam_search():
    # torchaudio.models.RNNTBeamSearch (registry library) through our adapter, ranking by score
    from tinyrnnt.decode.reference import reference_beam_search

    for seed in (1,):
        m = small_model(seed, blank_bias=-2.0, scale=5.0)
        feats, lens = torch.randn(6, 60, 8), torch.tensor([60, 50, 44, 30, 22, 60])
        theirs = reference_beam_search(m, feats, lens, beam=4)
        ours = [n[0][0] for n in beam_search(m, feats, lens, beam=4)]
        assert ours == theirs
        assert sum(map(len, ours)) > 0


def test_bad_beam_settings():
    m = small_model(0)
    with pytest.raises(ValueError, match="beam and max_symbols"):
        beam_search(m, torch.randn(1, 8, 8), torch.tensor([8]), beam=0)
