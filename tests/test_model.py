"""Transducer parts, greedy decoding, FLOP count."""

import torch

from tinyrnnt.decode.greedy import greedy_decode
from tinyrnnt.model.transducer import ModelConfig, Transducer, lstm_flops, stack_frames
from tinyrnnt.text import BLANK, VOCAB_SIZE

SMALL = ModelConfig(encoder_dim=32, predictor_dim=32, predictor_embed=16, joiner_dim=24, encoder_layers=2)


def test_shapes_follow_the_glossary():
    torch.manual_seed(0)
    m = Transducer(SMALL)
    B, T, U = 3, 50, 7
    logits, lens = m(torch.randn(B, T, 80), torch.tensor([50, 40, 9]), torch.randint(3, VOCAB_SIZE, (B, U)))
    assert logits.shape == (B, 7, U + 1, VOCAB_SIZE)  # T' = ceil(ceil(50 / 4) / 2) = 7
    assert lens.tolist() == [7, 5, 2]


def test_zero_label_bias_is_the_plain_path():
    torch.manual_seed(0)
    m = Transducer(SMALL).eval()
    x, xl, y = torch.randn(2, 30, 80), torch.tensor([30, 20]), torch.randint(3, VOCAB_SIZE, (2, 5))
    plain, _ = m(x, xl, y)
    biased, _ = m(x, xl, y, label_bias=torch.zeros(2, 6, SMALL.joiner_dim))
    assert torch.equal(plain, biased)


def test_stack_frames_keeps_order():
    x = torch.arange(12.0).reshape(1, 6, 2)
    y, n = stack_frames(x, torch.tensor([6]), 3)
    assert y[0, 1].tolist() == [6, 7, 8, 9, 10, 11] and n.tolist() == [2]


def test_lstm_flop_formula():
    # Common practice: an LSTM layer does 4 gate products of (input + hidden) x hidden per step,
    # two FLOPs per multiply-add.
    assert lstm_flops(10, 20, steps=3) == 2 * 4 * 20 * 30 * 3


def test_greedy_batch_equals_one_by_one_and_respects_guard():
    torch.manual_seed(1)
    m = Transducer(SMALL).eval()
    with torch.no_grad():
        m.joiner.out.bias[BLANK] = -5.0  # a model that rarely emits blank: the guard must hold
    x, xl = torch.randn(3, 40, 80), torch.tensor([40, 25, 12])
    batched = greedy_decode(m, x, xl, max_symbols=2)
    for b in range(3):
        single = greedy_decode(m, x[b: b + 1, : xl[b]], xl[b: b + 1], max_symbols=2)
        assert single[0] == batched[b]
    _, enc_lens = m.encoder(x, xl)
    assert all(len(h) <= 2 * int(n) for h, n in zip(batched, enc_lens))


def test_stateless_predictor_and_causal_encoder_decode():
    torch.manual_seed(3)
    cfg = ModelConfig(encoder_dim=16, predictor_dim=16, predictor_embed=8, joiner_dim=12, encoder_layers=2,
                      stateless_predictor=True, bidirectional=False)
    m = Transducer(cfg).eval()
    x, xl = torch.randn(2, 40, 80), torch.tensor([40, 30])
    out = m.losses(x, xl, torch.randint(3, VOCAB_SIZE, (2, 4)), torch.tensor([4, 3]))
    assert torch.isfinite(out["loss"]) and "ctc" in out
    batched = greedy_decode(m, x, xl)
    assert greedy_decode(m, x[1:, :30], xl[1:]) == batched[1:]


def test_causal_encoder_ignores_the_future():
    torch.manual_seed(4)
    m = Transducer(ModelConfig(encoder_dim=16, encoder_layers=2, bidirectional=False, dropout=0.0)).eval()
    x = torch.randn(1, 64, 80)
    y = x.clone()
    y[:, 48:] = torch.randn(1, 16, 80)  # change only the last 16 frames (the last 2 encoder frames)
    a, _ = m.encoder(x, torch.tensor([64]))
    b, _ = m.encoder(y, torch.tensor([64]))
    assert torch.equal(a[:, :6], b[:, :6]) and not torch.equal(a[:, 6:], b[:, 6:])


def test_padding_does_not_change_an_utterances_encoder_output():
    """A bidirectional encoder packs its input: the same utterance alone and inside a padded batch
    gives the same encoder frames (the backward direction must not start in the padding)."""
    torch.manual_seed(5)
    m = Transducer(SMALL).eval()
    x, xl = torch.randn(3, 57, 80), torch.tensor([57, 33, 9])
    for b in range(3):
        x[b, xl[b]:] = 0.0  # padding as the data loader writes it
    batched, lens = m.encoder(x, xl)
    for b in range(3):
        single, n = m.encoder(x[b: b + 1, : xl[b]], xl[b: b + 1])
        assert int(n) == int(lens[b])
        assert torch.allclose(single[0], batched[b, : int(n)], atol=1e-5)
        assert torch.all(batched[b, int(n):] == 0)  # padded encoder frames carry nothing
