"""Attention biasing over the list and trie + attention: invariants, the phrase gate, decoding."""

import pytest
import torch

from tinyrnnt.bias.attention import AttentionSettings, advance_gate, token_table
from tinyrnnt.bias.base import BiasConfig, build_biasing
from tinyrnnt.config import ConfigError
from tinyrnnt.decode.beam import beam_search
from tinyrnnt.decode.greedy import greedy_decode
from tinyrnnt.model.transducer import ModelConfig, Transducer
from tinyrnnt.text import SPACE, VOCAB_SIZE, TokenError, encode

SMALL = ModelConfig(encoder_dim=32, predictor_dim=32, predictor_embed=16, joiner_dim=24, encoder_layers=2)
KINDS = ["attention", "trie+attention"]
GATES = ["all", "prefix", "started"]
PRED = 20
# Edge cases (tests/STYLE): a one-token word, words sharing prefixes, a word longer than the
# utterance, an empty list; multi-word phrases for attention alone (the trie refuses them).
EDGE_LISTS = {
    "one_token": ["a", "kell"],
    "shared_prefixes": ["kel", "kell", "kelso", "kelsoran"],
    "longer_than_utterance": ["kellmarenoskeharbourside"],
    "empty": [],
}
TEXTS = ["call kelso a kell", "kel a", "maren kellx a kelsoran"]


def _targets(texts):
    ids = [encode(t) for t in texts]
    U = max(map(len, ids))
    targets = torch.full((len(ids), U), SPACE)
    for b, x in enumerate(ids):
        targets[b, : len(x)] = torch.tensor(x)
    return targets, torch.tensor([len(x) for x in ids])


ENC = 40  # encoder output size of the modules built here


def _module(kind, gate="all", encoder="conv", seed=0, query="predictor", values="phrase"):
    torch.manual_seed(seed)
    options = {"phrase_gate": gate, "encoder": encoder, "query": query, "values": values}
    return build_biasing(BiasConfig(kind=kind, options=options), 24, 16, PRED, ENC).eval()


def _attention(module):
    return module.attention if hasattr(module, "attention") else module


@pytest.mark.parametrize("kind", KINDS)
@pytest.mark.parametrize("gate", GATES)
def test_empty_list_gives_the_no_bias_context(kind, gate):
    module = _module(kind, gate)
    att = _attention(module)
    targets, lens = _targets(TEXTS)
    pred = torch.randn(3, targets.shape[1] + 1, PRED)
    only = module.after_predictor(module.features([[], [], []], targets, lens), pred)["joiner"]
    no_bias = att.to_joiner(att.no_bias)  # attention on the no-bias entry alone gives its own vector
    if kind == "attention":
        assert torch.allclose(only, no_bias.expand_as(only), atol=1e-6)
    else:  # the trie's empty-list cue plus the no-bias context
        trie = module.trie.encode(torch.zeros(VOCAB_SIZE))["joiner"]
        assert torch.allclose(only, (trie + no_bias).expand_as(only), atol=1e-5)


@pytest.mark.parametrize("kind", KINDS)
@pytest.mark.parametrize("gate,values", [(g, "phrase") for g in GATES] + [(g, "next_token") for g in GATES[1:]])
@pytest.mark.parametrize("case", sorted(EDGE_LISTS))
def test_decode_time_features_equal_training_features(kind, gate, values, case):
    module = _module(kind, gate, seed=1, values=values)
    lists = [EDGE_LISTS[case], ["kell", "maren"], EDGE_LISTS[case]]
    targets, lens = _targets(TEXTS)
    pred = torch.randn(3, targets.shape[1] + 1, PRED)
    train = module.after_predictor(module.features(lists, targets, lens), pred)["joiner"]  # (B, U+1, Dj)
    dec = module.decoder(lists)
    state = dec.start(3)
    rows = [dec.after_predictor(dec.features(state), pred[:, 0])["joiner"]]
    for u in range(targets.shape[1]):
        state = dec.advance(state, targets[:, u], torch.ones(3, dtype=torch.bool))
        rows.append(dec.after_predictor(dec.features(state), pred[:, u + 1])["joiner"])
    decoded = torch.stack(rows, dim=1)
    for b in range(3):
        n = int(lens[b]) + 1
        assert torch.allclose(train[b, :n], decoded[b, :n], atol=1e-5)


@pytest.mark.parametrize("encoder", ["conv", "lstm"])
def test_phrase_vectors_do_not_depend_on_the_other_entries(encoder):
    att = _module("attention", encoder=encoder)
    alone = att.encode_phrases(*token_table(["kel"]))
    ids, n = token_table(["kel", "kelsoranharbour", "a"])
    together = att.encode_phrases(ids, n)
    assert torch.allclose(alone[0], together[0], atol=1e-6)


@pytest.mark.parametrize("kind", KINDS)
def test_batch_of_one_equals_batched_decoding(kind):
    torch.manual_seed(3)
    model = Transducer(SMALL, BiasConfig(kind=kind, options={"phrase_gate": "prefix"})).eval()
    lists = [["kell", "kelso", "a"], [], ["maren"], ["kelsoran"]]
    x, xl = torch.randn(4, 60, 80), torch.tensor([60, 52, 44, 30])
    together = greedy_decode(model, x, xl, biaser=model.bias.decoder(lists))
    beams = beam_search(model, x, xl, lists, beam=3)
    for b in range(4):
        n = int(xl[b])
        one = x[b: b + 1, :n]
        assert greedy_decode(model, one, xl[b: b + 1], biaser=model.bias.decoder([lists[b]]))[0] == together[b]
        alone = beam_search(model, one, xl[b: b + 1], [lists[b]], beam=3)[0]
        assert [t for t, _ in alone] == [t for t, _ in beams[b]]
        # float sums of other batch shapes differ in the last bits (as in tests/test_beam.py; the
        # plain model shows the same 2e-4 relative difference on these inputs)
        assert [s for _, s in alone] == pytest.approx([s for _, s in beams[b]], rel=1e-3)


def _brute_force_gate(text: str, words: list[str], gate: str) -> list[list[bool]]:
    """Linear scan with string operations: at each label position u = 0..len(text), is entry j open?"""
    out = []
    for u in range(len(text) + 1):
        partial = text[:u].split(" ")[-1]  # the word being spelled ('' at a word start)
        out.append([w.startswith(partial) and (gate != "started" or partial != "") for w in words])
    return out


@pytest.mark.parametrize("gate", ["prefix", "started"])
@pytest.mark.parametrize("text", ["call kel", "kelso a kell", "a kelx kel", "kell"])
def test_phrase_gate_masks_entries_not_yet_started(gate, text):
    words = ["kell", "kelso", "a", "call", "maren"]
    att = _module("attention", gate)
    targets, lens = _targets([text])
    feats = att.features([words], targets, lens)
    mask = feats["attention_mask"][0]  # (U+1, N+1), no-bias first
    assert mask[:, 0].all()
    assert mask[:, 1:].tolist() == _brute_force_gate(text, words, gate)
    # and the masked entries get no weight at all
    keys, values = feats["attention_rows"]
    _, w = att.attend(att.query(torch.randn(1, len(text) + 1, PRED)), keys, values, feats["attention_mask"])
    assert (w[0][~mask] == 0).all() and torch.allclose(w.sum(-1), torch.ones(1, len(text) + 1))


def test_phrase_gate_follows_an_entry_across_its_space():
    ids, n = token_table(["kell harbour", "harbour"])
    pos, fresh = torch.zeros(1, 2, dtype=torch.long), torch.ones(1, dtype=torch.bool)
    trail = []
    for ch in encode("kell harbour"):
        pos, fresh = advance_gate(pos, fresh, torch.tensor([ch]), ids[None], n[None])
        trail.append(pos[0].tolist())
    assert trail[4] == [5, 0]  # after "kell ": the phrase goes on, the single word restarts
    assert trail[-1] == [12, 7]  # both complete


def test_attention_equals_torch_scaled_dot_product_attention():
    """Outside reference: torch.nn.functional.scaled_dot_product_attention (Vaswani et al., 2017)."""
    att = _module("attention")
    q, k, v = torch.randn(2, 5, 64), torch.randn(2, 7, 64), torch.randn(2, 7, 64)
    mask = torch.rand(2, 5, 7) > 0.3
    mask[..., 0] = True
    ours, _ = att.attend(q, k, v, mask)
    ref = torch.nn.functional.scaled_dot_product_attention(q, k, v, attn_mask=mask)
    assert torch.allclose(ours, ref, atol=1e-5)
    rows, _ = att.attend(q[:, 0], k, v, mask[:, 0])  # one query per decoding row
    assert torch.allclose(rows, ref[:, 0], atol=1e-5)


@pytest.mark.parametrize("width", [1, 3, 5])
def test_phrase_convolution_by_lookups_equals_torch_conv1d(width):
    """Outside reference: torch.nn.functional.conv1d over the token embeddings, zero-padded, with
    the module's own weights; values and gradients."""
    torch.manual_seed(width)
    att = build_biasing(BiasConfig(kind="attention", options={"width": width}), 24, 16, PRED, ENC)
    ids, _ = token_table(["kell", "a", "kelsoran", "mara"])
    ours = att.token_convolution(ids)
    ref = torch.nn.functional.conv1d(att.embed(ids).transpose(1, 2), att.conv.weight, att.conv.bias,
                                     padding=width // 2).transpose(1, 2)
    assert torch.allclose(ours, ref, atol=1e-5)
    g = torch.randn_like(ref)
    ours_grads = torch.autograd.grad((ours * g).sum(), [att.embed.weight, att.conv.weight, att.conv.bias])
    ref_grads = torch.autograd.grad((ref * g).sum(), [att.embed.weight, att.conv.weight, att.conv.bias])
    for a, b in zip(ours_grads, ref_grads):
        assert torch.allclose(a, b, atol=1e-4)
    with torch.no_grad():  # decoding's path (embedding_bag lookups, padding pooled at 0) against the same
        assert torch.allclose(att.token_convolution(ids), ref, atol=1e-5)
        lengths = torch.tensor([4, 1, 8, 4])
        pooled = torch.stack([ref[i, :n].max(0).values.relu() for i, n in enumerate(lengths.tolist())])
        assert torch.allclose(att.encode_phrases(ids, lengths), pooled, atol=1e-5)


def test_rows_packed_per_list_equal_torch_attention_row_by_row():
    """Outside reference: torch.nn.functional.scaled_dot_product_attention, one decoding row at a
    time over its own list's table; rows unevenly spread over the lists (one list has none)."""
    att = _module("attention")
    keys, values = torch.randn(4, 9, 64), torch.randn(4, 9, 64)
    which = torch.tensor([2, 0, 2, 2, 3, 0, 2])  # list 1 has no row
    q = torch.randn(len(which), 64)
    mask = torch.rand(len(which), 9) > 0.4
    mask[:, 0] = True
    ours, w = att.attend_grouped(q, keys, values, which, mask)
    for r, lst in enumerate(which.tolist()):
        ref = torch.nn.functional.scaled_dot_product_attention(q[r, None], keys[lst], values[lst], attn_mask=mask[r, None])
        assert torch.allclose(ours[r], ref[0], atol=1e-5)
    assert torch.allclose(w.sum(-1), torch.ones(len(which))) and not w[~mask].any()


@pytest.mark.parametrize("kind", KINDS)
def test_beam_search_runs_and_wide_lists_change_nothing_when_the_context_is_off(kind):
    torch.manual_seed(4)
    model = Transducer(SMALL, BiasConfig(kind=kind)).eval()
    plain = Transducer(SMALL).eval()
    plain.load_state_dict({k: v for k, v in model.state_dict().items() if not k.startswith("bias.")})
    for name, p in model.bias.named_parameters():
        if any(part.startswith("to_") for part in name.split(".")):
            torch.nn.init.zeros_(p)
    x, xl = torch.randn(2, 50, 80), torch.tensor([50, 40])
    lists = [["kell", "kelso"] * 30, ["maren"]]
    assert beam_search(model, x, xl, lists, beam=4) == beam_search(plain, x, xl, None, beam=4)


@pytest.mark.parametrize("entry", ["k3ll", "kell!", "ma\u00efren"])
def test_characters_outside_the_inventory_are_refused_where_lists_are_read(entry, tmp_path):
    from tinyrnnt.data import CorpusError
    from tinyrnnt.lab.evaluate import read_list_file

    module = _module("attention")
    targets, lens = _targets(["kell"])
    with pytest.raises(TokenError, match="biasing list entry"):
        module.features([["kell", entry]], targets, lens)
    with pytest.raises(TokenError, match="biasing list entry"):
        module.decoder([[entry]])
    path = tmp_path / "list.txt"
    path.write_text(f"kell\n{entry}\n", encoding="utf-8")
    with pytest.raises((TokenError, CorpusError), match="list.txt:2"):
        read_list_file(path)


@pytest.mark.parametrize("options,message", [
    ({"phrase_gate": "sometimes"}, "phrase_gate must be one of"),
    ({"encoder": "transformer"}, "encoder must be one of"),
    ({"width": 4}, "width must be odd"),
    ({"dim": 0}, "dim must be above 0"),
    ({"size": 3}, "unknown key 'size'; valid keys: context_dropout, dim, embed, encoder, guide, phrase_gate, query, steer, values, width"),
    ({"guide": -1}, "guide cannot be negative"),
    ({"query": "encoder", "guide": 1.0}, "guide needs query: predictor"),
    ({"values": "next_token"}, "needs phrase_gate 'prefix' or 'started'"),
    ({"values": "letters"}, "values must be one of"),
    ({"steer": True}, "steer needs values: next_token"),
    ({"query": "encoder", "phrase_gate": "prefix"}, "needs the label history"),
    ({"query": "joiner"}, "query must be one of"),
])
def test_bad_settings_name_the_field(options, message):
    with pytest.raises(ConfigError, match=message):
        build_biasing(BiasConfig(kind="attention", options=options), 24, 16, PRED, ENC)


def test_settings_defaults_are_valid():
    assert AttentionSettings().phrase_gate == "all"


@pytest.mark.parametrize("kind", ["trie", "attention", "trie+attention"])
def test_beam_search_keeps_apart_equal_prefixes_of_utterances_with_other_lists(kind):
    """The same audio twice in one batch, the second late by two encoder frames, with different lists:
    each decodes as it does alone (the predictor's cache of prefixes must not hand one utterance's
    biased state to the other when the second reaches a prefix the first reached earlier)."""
    torch.manual_seed(0)
    model = Transducer(SMALL, BiasConfig(kind=kind, inject="both")).eval()
    with torch.no_grad():  # a model that writes several tokens (as in tests/test_beam.py), strongly biased
        model.joiner.out.weight.mul_(4)
        model.joiner.out.bias[1:] = torch.randn(VOCAB_SIZE - 1) * 2
        model.joiner.out.bias[0] = -2
        for p in model.bias.parameters():
            p.mul_(3)
    first = torch.randn(160, 80)
    x = torch.stack([torch.cat([first, torch.zeros(16, 80)]), torch.cat([torch.zeros(16, 80), first])])
    xl = torch.tensor([176, 176])
    lists = [["kell", "kelso", "a", "mora"], ["maren", "oske", "bell"]]
    together = beam_search(model, x, xl, lists, beam=3)
    for b in range(2):
        alone = beam_search(model, x[b: b + 1], xl[b: b + 1], [lists[b]], beam=3)[0]
        assert [t for t, _ in alone] == [t for t, _ in together[b]]
        assert [s for _, s in alone] == pytest.approx([s for _, s in together[b]], rel=1e-5)


def test_recipe_keeps_the_trie_benchmark_arms_and_gives_the_new_arms_their_schedule():
    """attention_vs_trie's baseline and trie runs train exactly as trie_vs_baseline's (so the benchmark
    may reuse them), and the new arms share the trie arm's steps, schedule and training lists."""
    from tinyrnnt import config as C
    from tinyrnnt.lab.attentionbench import _comparable
    from tinyrnnt.lab.recipes import expand_arms, read_recipe

    ours = expand_arms(read_recipe("attention_vs_trie"))
    trie = expand_arms(read_recipe("trie_vs_baseline"))
    for key in ("baseline", "trie", "trie_control"):
        assert _comparable(C.to_dict(ours[key].cfg)) == _comparable(C.to_dict(trie[key].cfg))
    for key in ("attention", "trie_attention"):
        assert ours[key].control == "trie_control" and ours[key].source == "baseline"
        assert C.to_dict(ours[key].cfg.train) == C.to_dict(ours["trie"].cfg.train)
        assert ours[key].cfg.bias.sampling == ours["trie"].cfg.bias.sampling


@pytest.fixture(scope="module")
def tiny_run(tmp_path_factory):
    """A tiny corpus and an attention model trained for 2 steps (settings of tests/test_cli.py)."""
    from test_cli import SMALL, TINY

    from tinyrnnt.cli import main
    from tinyrnnt.synth.corpus import CorpusConfig, build_corpus

    root = tmp_path_factory.mktemp("attention")
    build_corpus(CorpusConfig(seed=2, **TINY), root / "corpus", quiet=True)
    assert main(["train", "--quiet", f"data.corpus={root / 'corpus'}", f"run_dir={root / 'run'}",
                 "bias.kind=trie+attention", "bias.options={phrase_gate: prefix}"] + SMALL) == 0
    return root


def test_picture_command_writes_the_heatmap_and_the_lattice(tiny_run, capsys):
    import json

    from tinyrnnt.cli import main

    ckpt = tiny_run / "run" / "checkpoints" / "last.ckpt"
    assert main(["picture", str(ckpt), "--list-size", "10", "--out", str(tiny_run / "pictures")]) == 0
    facts = json.loads(next((tiny_run / "pictures").glob("*.pictures.json")).read_text())
    assert facts["list_size"] == 10 and len(facts["files"]) == 2
    assert all(open(f, "rb").read(8) == b"\x89PNG\r\n\x1a\n" for f in facts["files"])  # PNG signature
    assert facts["attention_entries_shown"][0] == "(no bias)" and len(facts["attention_entries_shown"]) == 11
    capsys.readouterr()
    assert main(["picture", str(ckpt), "--utterance", "nobody", "--out", str(tiny_run / "pictures")]) == 2
    assert "is not in split 'test_unseen'" in capsys.readouterr().err


def test_cost_measurement_times_every_size_and_lists_grow_past_the_corpus(tiny_run):
    from tinyrnnt.data import CorpusSplit
    from tinyrnnt.lab.cost import largest_list, measure_method, timing_list

    split = CorpusSplit(str(tiny_run / "corpus"), "test_unseen")
    big = largest_list(split) + 50
    words = timing_list(split, 3, big)
    assert len(words) == len(set(words)) == big
    assert words[:10] == split.biasing_list(3, 10)  # the corpus list first, its rare words leading
    r = measure_method("trie+attention", str(tiny_run / "run" / "checkpoints" / "last.ckpt"),
                       str(tiny_run / "corpus"), (5, big), utterances=2, train_batch=2, train_repeats=1)
    assert set(r["decode_ms"]) == set(r["train_ms"]) == {"5", str(big)}
    assert all(v > 0 for v in [*r["decode_ms"].values(), *r["train_ms"].values()])
    assert r["peak_mb"] >= r["loaded_mb"] > 0


def test_bench_lists_the_attention_benchmark(capsys):
    from tinyrnnt.bench import main

    with pytest.raises(SystemExit):
        main(["--help"])
    text = capsys.readouterr().out
    assert "attention" in text and "--sizes" in text and "--trie-run-dir" in text


@pytest.mark.parametrize("kind", KINDS)
@pytest.mark.parametrize("case", sorted(EDGE_LISTS))
def test_encoder_query_frame_features_equal_in_training_and_decoding(kind, case):
    """query: encoder: the feature per frame (B, T', Dj) of training equals what the decoder's
    frames() gives each row; with an empty list it is the no-bias context at every frame."""
    module = _module(kind, query="encoder", seed=6)
    lists = [EDGE_LISTS[case], ["kell", "maren"], []]
    targets, lens = _targets(TEXTS)
    enc = torch.randn(3, 9, ENC)
    train = module.after_encoder(module.features(lists, targets, lens), enc, torch.tensor([9, 7, 5]))
    assert "joiner" not in module.after_predictor(train, torch.randn(3, targets.shape[1] + 1, PRED)) \
        or kind == "trie+attention"  # the trie's own joiner feature only
    decoded = module.decoder(lists).frames(enc)
    assert torch.allclose(train["encoder"], decoded, atol=1e-5)
    att = _attention(module)
    empty = att.to_joiner(att.no_bias)  # attention on the no-bias entry alone gives its own vector
    assert torch.allclose(decoded[2], empty.expand_as(decoded[2]), atol=1e-5)


@pytest.mark.parametrize("kind", KINDS)
def test_encoder_query_batch_of_one_equals_batched_decoding(kind):
    torch.manual_seed(7)
    model = Transducer(SMALL, BiasConfig(kind=kind, options={"query": "encoder"})).eval()
    lists = [["kell", "kelso", "a"], [], ["maren"]]
    x, xl = torch.randn(3, 60, 80), torch.tensor([60, 52, 44])
    together = greedy_decode(model, x, xl, biaser=model.bias.decoder(lists))
    beams = beam_search(model, x, xl, lists, beam=3)
    for b in range(3):
        one, n = x[b: b + 1, : int(xl[b])], xl[b: b + 1]
        assert greedy_decode(model, one, n, biaser=model.bias.decoder([lists[b]]))[0] == together[b]
        alone = beam_search(model, one, n, [lists[b]], beam=3)[0]
        assert [t for t, _ in alone] == [t for t, _ in beams[b]]
        assert [s for _, s in alone] == pytest.approx([s for _, s in beams[b]], rel=1e-3)


def test_guide_targets_point_inside_listed_words_only():
    """Worked by hand: "call kelso a kell" with "kelso" and "kell" listed; positions predicting a
    listed word's later tokens point at it, its first token is skipped, the rest is no-bias."""
    from tinyrnnt.bias.guide import IGNORE, guide_targets

    targets, lens = _targets(["call kelso a kell", "kel a"])
    got = guide_targets([["kell", "kelso"], ["a b"]], targets, lens)
    I = IGNORE
    assert got[0].tolist() == [0, 0, 0, 0, 0, I, 2, 2, 2, 2, 0, 0, 0, I, 1, 1, 1, I]
    assert got[1].tolist() == [0] * 5 + [I] * 13  # "a b" is no word sequence of "kel a"


def test_guided_attention_loss_is_the_mean_negative_log_weight_and_trains_the_attention():
    """The loss by hand (mean of -log w at the targets, as cross-entropy is defined); with it the
    attention's query and key layers get a gradient from the loss alone, and a few optimiser steps
    on it move the weight onto the spoken entry."""
    from tinyrnnt.bias.guide import IGNORE, guide_loss, guide_targets

    w = torch.softmax(torch.randn(2, 3, 4), -1)
    t = torch.tensor([[0, 3, IGNORE], [1, IGNORE, 2]])
    by_hand = -(w[0, 0, 0].log() + w[0, 1, 3].log() + w[1, 0, 1].log() + w[1, 2, 2].log()) / 4
    assert torch.allclose(guide_loss(w, t), by_hand)

    torch.manual_seed(0)
    model = Transducer(SMALL, BiasConfig(kind="attention", options={"guide": 1.0})).train()
    targets, lens = _targets(["call kelso a kell"])
    lists = [["kelso", "maren", "kell", "barra"]]
    feats = torch.randn(1, 60, SMALL.feature_bins)
    before = model.losses(feats, torch.tensor([60]), targets, lens, lists)
    assert {"rnnt", "bias", "loss"} <= set(before)
    assert torch.allclose(before["loss"], before["rnnt"] + before["bias"])
    before["bias"].backward()
    att = model.bias
    assert att.query.weight.grad.abs().sum() > 0 and att.key.weight.grad.abs().sum() > 0
    opt = torch.optim.Adam(att.parameters(), lr=0.01)
    for _ in range(30):
        opt.zero_grad()
        model.losses(feats, torch.tensor([60]), targets, lens, lists)["bias"].backward()
        opt.step()
    after = model.losses(feats, torch.tensor([60]), targets, lens, lists)["bias"]
    assert after < 0.5 * before["bias"].detach()
    model.eval()  # not in evaluation: no targets, no loss
    assert "bias" not in model.losses(feats, torch.tensor([60]), targets, lens, lists)


@pytest.mark.parametrize("gate", ["prefix", "started"])
@pytest.mark.parametrize("text", ["call kel", "kelso a kell", "a kelx kel", "kell"])
def test_next_token_values_are_the_letter_each_open_entry_continues_with(gate, text):
    """Against string slicing: at each label position, an entry the partial word is a prefix of
    continues with its next letter (a space once complete), and the context is the weighted sum
    of those letters' embeddings plus the no-bias vector (written out entry by entry)."""
    from tinyrnnt.bias.attention import NEXT_KEY

    words = ["kell", "kelso", "a", "call", "maren"]
    att = _module("attention", gate, values="next_token")
    targets, lens = _targets([text])
    feats = att.features([words], targets, lens)
    mask, nxt = feats["attention_mask"][0], feats[NEXT_KEY][0]  # (U+1, N+1), (U+1, N)
    for u in range(len(text) + 1):
        partial = text[:u].split(" ")[-1]
        for i, w in enumerate(words):
            if mask[u, i + 1]:
                assert w.startswith(partial)
                letter = (w + " ")[len(partial)]
                assert nxt[u, i].item() == (SPACE if letter == " " else encode(letter)[0])
    w = torch.softmax(torch.randn(len(text) + 1, len(words) + 1).masked_fill(~mask, float("-inf")), -1)
    by_entry = w[:, :1] * att.no_bias + sum(w[:, i + 1: i + 2] * att.next_embed.weight[nxt[:, i]]
                                            for i in range(len(words)))
    assert torch.allclose(att.next_context(w, nxt)[0], by_entry, atol=1e-6)


def test_steered_mixing_target_decodes_as_it_trains():
    """trie + attention with steer (the weighted mixing boost itself: tests/test_bias.py): the steered
    "logits" feature and the joiner feature are the same in training and decoding for the same
    history; an empty list steers nothing; it needs the mixing boost."""
    torch.manual_seed(9)
    cfg = BiasConfig(kind="trie+attention", token_boost=True, boost_mode="mix",
                     options={"phrase_gate": "prefix", "values": "next_token", "steer": True})
    module = build_biasing(cfg, 24, 16, PRED, ENC).eval()
    lists = [["kell", "kelso", "a"], ["kell", "maren"], []]
    targets, lens = _targets(TEXTS)
    pred = torch.randn(3, targets.shape[1] + 1, PRED)
    train = module.after_predictor(module.features(lists, targets, lens), pred)
    dec = module.decoder(lists)
    state, rows = dec.start(3), []
    for u in range(targets.shape[1] + 1):
        rows.append(dec.after_predictor(dec.features(state), pred[:, u]))
        if u < targets.shape[1]:
            state = dec.advance(state, targets[:, u], torch.ones(3, dtype=torch.bool))
    for key in ("logits", "joiner"):
        decoded = torch.stack([r[key] for r in rows], dim=1)
        for b in range(3):
            n = int(lens[b]) + 1
            assert torch.allclose(train[key][b, :n], decoded[b, :n], atol=1e-5)
    assert (train["logits"][2] == 0).all()  # an empty list: no tree, nothing to steer
    with pytest.raises(ConfigError, match="needs bias.token_boost: true and bias.boost_mode: mix"):
        build_biasing(BiasConfig(kind="trie+attention", options=cfg.options), 24, 16, PRED, ENC)


def test_context_dropout_leaves_out_whole_utterances_in_training_only():
    """bias.options.context_dropout (modality dropout, common practice): in training each
    utterance's attention context is either all there or all left out, so the pair's joiner input
    is then the trie cue's alone; in eval mode it is always there."""
    torch.manual_seed(0)
    cfg = BiasConfig(kind="trie+attention", cue_dropout=0.0, options={"phrase_gate": "prefix", "context_dropout": 0.5})
    module = build_biasing(cfg, 24, 16, PRED, ENC)
    texts = TEXTS * 4
    targets, lens = _targets(texts)
    lists = [["kell", "maren"]] * len(texts)
    pred = torch.randn(len(texts), targets.shape[1] + 1, PRED)
    module.eval()
    both = module.after_predictor(module.features(lists, targets, lens), pred)["joiner"]
    trie = module.trie.features(lists, targets, lens)["joiner"]
    module.train()
    torch.manual_seed(1)
    dropped = module.after_predictor(module.features(lists, targets, lens), pred)["joiner"]
    kept = [torch.allclose(d, b, atol=1e-6) for d, b in zip(dropped, both)]
    alone = [torch.allclose(d, t.expand_as(d), atol=1e-6) for d, t in zip(dropped, trie)]
    assert all(k != a for k, a in zip(kept, alone)) and any(kept) and any(alone)
    with pytest.raises(ConfigError, match="context_dropout is a share of utterances, below 1"):
        AttentionSettings(context_dropout=1.0)
