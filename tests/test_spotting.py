"""Keyword spotting that steers the trie's mixing boost (tinyrnnt.bias.spotting)."""

import itertools

import pytest
import torch

from tinyrnnt.bias.base import BiasConfig
from tinyrnnt.bias.spotting import FLOOR, SpottingBiaser, can_spot, frame_scores, spot_starts, spotting_decoder
from tinyrnnt.decode.beam import beam_search
from tinyrnnt.decode.greedy import greedy_decode
from tinyrnnt.model.transducer import ModelConfig, Transducer
from tinyrnnt.text import BLANK, SPACE, VOCAB_SIZE, encode

SMALL = ModelConfig(encoder_dim=32, predictor_dim=32, predictor_embed=16, joiner_dim=24, encoder_layers=2)
HEARD = BiasConfig(kind="trie", cue_dim=8, token_boost=True, boost_mode="mix_heard")


def _collapse(path):
    """A CTC path's label sequence: repeats merged, then blanks removed (Graves et al., ICML 2006)."""
    out = [k for k, _ in itertools.groupby(path)]
    return [k for k in out if k != BLANK]


@pytest.mark.parametrize("block", [16, 2])
def test_spotting_scores_are_the_best_ctc_path_from_the_definition(block, monkeypatch):
    """Every start frame's score against brute force over all paths of every span (the CTC
    collapse rule of Graves et al. 2006): the best path spelling the entry minus the best free path
    over the same frames, ending wherever it scores best. block 2: the frames' state scores are
    gathered two frames at a time, so the recursion crosses those blocks."""
    import tinyrnnt.bias.spotting as spotting

    monkeypatch.setattr(spotting, "BLOCK", block)
    torch.manual_seed(0)
    V, T = 4, 5  # blank and three letters
    logp = torch.log_softmax(torch.randn(2, T, V) * 2, -1)
    lens = torch.tensor([5, 4])
    entries = [[1], [1, 2], [2, 2], [3, 1, 3]]
    L = 3
    ids = torch.zeros(2, len(entries), L, dtype=torch.long)
    for j, e in enumerate(entries):
        ids[:, j, : len(e)] = torch.tensor(e)
    id_lens = torch.tensor([[len(e) for e in entries]] * 2)
    got = spot_starts(logp, lens, ids, id_lens, chunks=1)
    assert torch.equal(spot_starts(logp, lens, ids, id_lens, chunks=2), got)  # groups of similar length
    for b in range(2):
        n = int(lens[b])
        rel = logp[b, :n] - logp[b, :n].max(-1, keepdim=True).values
        for j, e in enumerate(entries):
            for t0 in range(n):
                best = max((sum(float(rel[t0 + k, v]) for k, v in enumerate(path))
                            for t1 in range(t0, n) for path in itertools.product(range(V), repeat=t1 - t0 + 1)
                            if _collapse(path) == e), default=None)
                if best is None:
                    assert got[b, t0, j] < -1e20  # the entry cannot fit in the frames left
                else:
                    assert got[b, t0, j].item() == pytest.approx(best, abs=1e-5)
    assert (got[1, 4:] < -1e20).all()  # past the row's length


def test_groups_of_similar_length_give_the_same_scores():
    torch.manual_seed(1)
    logp = torch.log_softmax(torch.randn(3, 30, VOCAB_SIZE) * 3, -1)
    ids = torch.randint(1, VOCAB_SIZE, (3, 40, 9))
    id_lens = torch.randint(0, 10, (3, 40))
    lens = torch.tensor([30, 22, 9])
    assert torch.equal(spot_starts(logp, lens, ids, id_lens, chunks=3), spot_starts(logp, lens, ids, id_lens, chunks=1))


def test_frame_scores_take_the_best_start_near_each_transducer_frame():
    starts = torch.tensor([[[0.0], [5.0], [1.0], [2.0], [3.0], [9.0]]])  # six CTC frames, one entry
    assert frame_scores(starts, 2, 3, reach=1)[0, :, 0].tolist() == [5.0, 5.0, 9.0]


def _model(seed=0, **bias):
    torch.manual_seed(seed)
    cfg = BiasConfig(**{**HEARD.__dict__, **bias})
    return Transducer(SMALL, cfg).eval()


def test_spotting_steers_the_mixing_target_towards_the_spotted_entry():
    """At a word start with entries "ab" and "cb", spotting that hears "cb" puts the weight of the
    allowed first letters on "c"; after "c" the partial word matches "cb" only; with no entry
    open (a letter no entry has) nothing is steered."""
    model = _model()
    lists = [["ab", "cb"]]
    biaser = SpottingBiaser(model.bias.decoder(lists), lists, ratio=2)
    biaser.use_scores(torch.tensor([[[-9.0, 0.0], [-9.0, 0.0]]]), torch.tensor([0]))  # (U, T', N)
    state = biaser.start(1)
    cue = biaser.features(state)["logits"][0]
    a, b, c = encode("abc")
    assert cue[c] == pytest.approx(1.0 + FLOOR, abs=1e-3) and cue[a] == pytest.approx(FLOOR, abs=1e-3)
    assert cue[b] == 0  # not allowed by the tree: stays out of the target
    state = biaser.advance(state, torch.tensor([c]), torch.tensor([True]))
    assert biaser.features(state)["logits"][0][b] == pytest.approx(1.0 + FLOOR, abs=1e-4)
    state = biaser.advance(state, torch.tensor([a]), torch.tensor([True]))  # "ca": no entry matches
    assert (biaser.features(state)["logits"][0] == 0).all()  # the tree is dead too


def test_entries_heard_nowhere_are_dropped_from_the_steering(monkeypatch):
    """CTC frames that spell "cb" and nothing else: "ab" and "cd" score far below HEARD_FLOOR
    (a letter the head never emits), so only "cb" steers; a hypothesis that goes on to spell "ab"
    follows no heard entry, so its boost is off (an all-zero cue: the mixing correction is 0 and
    the model's own logits stand), where without the floor it would be steered along "ab".
    Numbers worked by hand from the definition in tinyrnnt.bias.spotting."""
    import tinyrnnt.bias.spotting as spotting

    a, b, c, d = encode("abcd")
    frames = [BLANK, c, BLANK, b, BLANK, BLANK]
    logp = torch.full((1, len(frames), VOCAB_SIZE), -60.0)
    for t, v in enumerate(frames):
        logp[0, t, v] = 0.0  # the head is sure: every other label at e^-60
    lists = [["ab", "cb", "cd"]]
    model = _model()

    def after_a(floor):
        monkeypatch.setattr(spotting, "HEARD_FLOOR", floor)
        biaser = SpottingBiaser(model.bias.decoder(lists), lists, ratio=2)
        biaser.hear(logp, torch.tensor([len(frames)]), torch.tensor([0]), 3)
        state = biaser.start(1)
        at_start = biaser.features(state)["logits"][0]
        state = biaser.advance(state, torch.tensor([a]), torch.tensor([True]))
        return biaser, at_start, biaser.features(state)["logits"][0]

    biaser, at_start, cue = after_a(-20.0)
    assert biaser.C == 3  # only "cb" kept: its nodes (the root, "c", "cb") carry spotting mass
    assert at_start[c] == pytest.approx(1.0 + FLOOR, abs=1e-6) and at_start[a] == pytest.approx(FLOOR)
    assert (cue == 0).all()  # "ab" was never heard: no boost at all for this hypothesis
    logits = torch.randn(VOCAB_SIZE)
    hidden = torch.randn(model.cfg.joiner_dim)
    assert (model.bias.token_scores(hidden, cue, logits) == 0).all()  # the model's own logits stand
    _, at_start, cue = after_a(float("-inf"))  # every entry kept: "ab" is the only one open after "a"
    assert at_start[c] == pytest.approx(1.0 + FLOOR, abs=1e-6)
    assert cue[b] == pytest.approx(1.0 + FLOOR)


def test_spotting_with_empty_lists_decodes_as_without_it_and_batches_agree():
    model = _model(seed=3)
    x, xl = torch.randn(3, 60, 80), torch.tensor([60, 52, 40])
    empty = [[], [], []]
    plain = greedy_decode(model, x, xl, biaser=model.bias.decoder(empty))
    assert greedy_decode(model, x, xl, biaser=_listening(model, empty)) == plain
    lists = [["kell", "kelso", "a"], ["maren"], []]
    together = greedy_decode(model, x, xl, biaser=_listening(model, lists))
    beams = beam_search(model, x, xl, lists, beam=3, spotting=True)
    for b in range(3):
        one, n = x[b: b + 1, : int(xl[b])], xl[b: b + 1]
        assert greedy_decode(model, one, n, biaser=_listening(model, [lists[b]]))[0] == together[b]
        alone = beam_search(model, one, n, [lists[b]], beam=3, spotting=True)[0]
        assert [t for t, _ in alone] == [t for t, _ in beams[b]]
    assert [t for t, _ in beam_search(model, x, xl, empty, beam=3, spotting=True)[0]] == \
        [t for t, _ in beam_search(model, x, xl, empty, beam=3)[0]]


def _listening(model, lists):
    return spotting_decoder(model, lists)


@pytest.mark.parametrize("bias,model_cfg,message", [
    (dict(boost_mode="mix"), SMALL, "needs a model trained with bias.token_boost: true and bias.boost_mode: mix_heard"),
    (dict(token_boost=False), SMALL, "mix_heard"),
    ({}, ModelConfig(encoder_dim=32, predictor_dim=32, predictor_embed=16, joiner_dim=24, encoder_layers=2,
                     ctc_weight=0.0), "needs a model trained with model.ctc_weight > 0"),
])
def test_spotting_names_what_the_model_lacks(bias, model_cfg, message):
    model = Transducer(model_cfg, BiasConfig(**{**HEARD.__dict__, **bias})).eval()
    assert not can_spot(model)
    with pytest.raises(ValueError, match=message):
        spotting_decoder(model, [["kell"]])
    assert can_spot(_model()) and not can_spot(Transducer(SMALL).eval())


def test_a_token_boost_scaled_to_nothing_leaves_nothing_to_steer():
    """evaluate() skips spotting when decode.model_boost_scale is 0: beam search with fusion and the
    model's boost scaled to 0 gives the same hypotheses and scores with and without spotting."""
    model = _model(seed=5)
    x, xl = torch.randn(2, 60, 80), torch.tensor([60, 45])
    lists = [["kell", "kelso"], ["maren", "a"]]
    boost = {"weight": 1.0, "where": "anywhere"}
    with torch.no_grad(), model.scaled_token_boost(0.0):
        plain = beam_search(model, x, xl, lists, beam=3, boost=boost)
        spotted = beam_search(model, x, xl, lists, beam=3, boost=boost, spotting=True)
    assert [[t for t, _ in n] for n in plain] == [[t for t, _ in n] for n in spotted]
    for a, b in zip(plain, spotted):
        assert [s for _, s in a] == pytest.approx([s for _, s in b], abs=1e-5)


def test_steering_weights_are_the_softmax_over_the_entries_the_partial_word_still_matches():
    """The per-node sums the biaser reads against the definition written out over the list's
    strings: at each step, the kept entries (heard somewhere above HEARD_FLOOR) that start with
    the partial word, softmax of their scores at the frame where the word began (at a word start:
    the current frame), summed by the letter each continues with (the space: the entry is
    complete), plus FLOOR; no boost where no such entry could start there. Random scores (some
    entries below the floor everywhere, some frames where an entry cannot start), a repeated entry,
    random emissions over several frames and utterances."""
    import math

    import tinyrnnt.bias.spotting as spotting

    model = _model(seed=5)
    lists = [["vel", "veldar", "velin", "dorn", "dara", "dal", "dal"], ["kell", "kebo", "bel", "ben", "kemi"]]
    rows = [0, 0, 0, 1, 1]
    row_lists = [lists[u] for u in rows]
    gen = torch.Generator().manual_seed(0)
    T2, N = 8, max(len(x) for x in lists)
    scores = torch.rand(2, T2, N, generator=gen) * -30  # nats under the best free path
    scores[torch.rand(2, T2, N, generator=gen) < 0.15] = spotting.NEG  # cannot start near the frame
    scores[1, :, len(lists[1]):] = spotting.NEG  # no entry there
    scores[0, :, 3] = -25.0  # "dorn": below the floor everywhere, left out
    biaser = SpottingBiaser(model.bias.decoder(row_lists), row_lists, ratio=2)
    biaser.use_scores(scores, torch.tensor(rows))
    kept = [[j for j in range(len(lst)) if scores[u, :, j].max() > spotting.HEARD_FLOOR] for u, lst in enumerate(lists)]

    def expected(u, partial, frame):
        out = torch.zeros(VOCAB_SIZE)
        open_ = [j for j in kept[u] if lists[u][j].startswith(partial)]
        live = [j for j in open_ if scores[u, frame, j] > spotting.CANNOT]
        if not live:
            return out  # no heard entry to follow: the boost is off
        top = max(float(scores[u, frame, j]) for j in open_)
        z = sum(math.exp(float(scores[u, frame, j]) - top) for j in open_)
        for j in open_:
            word = lists[u][j]
            nxt = SPACE if word == partial else encode(word[len(partial)])[0]
            out[nxt] += math.exp(float(scores[u, frame, j]) - top) / z
        return out + FLOOR

    texts, began = ["" for _ in rows], [0 for _ in rows]
    state, inside = biaser.start(len(rows)), 0
    alphabet = "veldarinobkm "
    for step in range(240):
        if step % 4 == 0:
            biaser.set_frame(min(step // 4, T2 - 1))
        cue = biaser.inner.features(state[0])["logits"]
        got = biaser.features(state)["logits"]
        for k, u in enumerate(rows):
            partial = texts[k].split(" ")[-1]
            frame = biaser.frame if not partial else began[k]
            assert torch.allclose(got[k], cue[k] * expected(u, partial, frame), atol=1e-5), (texts[k], frame)
            inside += bool(partial) and sum(lists[u][j].startswith(partial) for j in kept[u]) > 1
        tokens, emit = [], torch.rand(len(rows), generator=gen) < 0.8
        for k, u in enumerate(rows):  # mostly a letter that follows some entry, else any letter or a space
            partial = texts[k].split(" ")[-1]
            follow = [w[len(partial)] if len(w) > len(partial) else " " for w in lists[u] if w.startswith(partial)]
            pool = follow if follow and torch.rand(1, generator=gen) < 0.85 else alphabet
            ch = pool[int(torch.randint(0, len(pool), (1,), generator=gen))]
            if emit[k]:
                if not partial and ch != " ":
                    began[k] = biaser.frame
                texts[k] += ch
            tokens.append(encode(ch)[0] if ch != " " else SPACE)
        state = biaser.advance(state, torch.tensor(tokens), emit)
    assert inside > 50  # rows inside words with several entries to choose from were checked
