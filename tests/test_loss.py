"""Tests for the transducer loss: worked examples, brute force, torchaudio, padding, gradcheck."""

from __future__ import annotations

import math

import pytest
import torch

from tinyrnnt.model.loss import (
    _logsumexp,
    _TransducerLoss,
    brute_force_loss,
    gather_logprobs,
    time_losses,
    transducer_loss,
    transducer_loss_from_logprobs,
)
from tinyrnnt.text import BLANK

torchaudio_functional = pytest.importorskip("torchaudio.functional")


def _random_batch(gen, B, T, U, V, dtype=torch.float32, full=True):
    """Random logits and ragged lengths; with full=True the longest lengths fill the padding."""
    logits = torch.randn(B, T, U + 1, V, generator=gen, dtype=dtype) * 2
    targets = torch.randint(1, V, (B, U), generator=gen)
    logit_lengths = torch.randint(1, T + 1, (B,), generator=gen)
    target_lengths = torch.randint(0, U + 1, (B,), generator=gen)
    if full:
        logit_lengths[0], target_lengths[-1] = T, U
    return logits, targets, logit_lengths, target_lengths


def _worked_logits(dtype=torch.float32):
    # Graves 2012 (definition of the output lattice), worked by hand:
    # T = 2, U = 1, target (a), tokens (blank, a, b). Two alignments:
    #   a, blank, blank: 0.3 (0,0) * 0.7 (0,1) * 0.8 (1,1) = 0.168
    #   blank, a, blank: 0.6 (0,0) * 0.4 (1,0) * 0.8 (1,1) = 0.192
    # P = 0.36, loss = -ln 0.36 = 1.0216512.
    probs = torch.tensor(
        [
            [[0.6, 0.3, 0.1], [0.7, 0.2, 0.1]],  # t = 0: u = 0, u = 1
            [[0.5, 0.4, 0.1], [0.8, 0.1, 0.1]],  # t = 1
        ],
        dtype=dtype,
    )
    return probs.log()[None], torch.tensor([[1]])  # logits (1, 2, 2, 3): softmax gives back probs


@pytest.mark.parametrize("implementation", ["ours", "torchaudio"])
def test_worked_example_from_the_definition(implementation):
    logits, targets = _worked_logits()
    loss = transducer_loss(logits, targets, torch.tensor([2]), torch.tensor([1]), implementation=implementation)
    assert loss.item() == pytest.approx(1.0216512, abs=1e-6)
    assert math.exp(-loss.item()) == pytest.approx(0.36, abs=1e-6)


def test_brute_force_on_the_worked_example():
    logits, targets = _worked_logits(torch.float64)
    logprobs = torch.log_softmax(logits[0], -1)
    assert brute_force_loss(logprobs, [1]) == pytest.approx(-math.log(0.36), abs=1e-12)


@pytest.mark.parametrize("implementation", ["ours", "torchaudio"])
def test_uniform_distribution_closed_form(implementation):
    # Graves 2012: every alignment has T blanks and U labels and ends with a blank, so
    # there are C(T - 1 + U, U) of them, each of probability V^-(T + U) when uniform.
    T, U, V = 4, 2, 5
    expected = -math.log(math.comb(T - 1 + U, U) * V ** -(T + U))
    assert expected == pytest.approx(7.3540424, abs=1e-7)
    logits = torch.zeros(1, T, U + 1, V)
    loss = transducer_loss(logits, torch.tensor([[3, 1]]), torch.tensor([T]), torch.tensor([U]),
                           implementation=implementation)
    assert loss.item() == pytest.approx(expected, abs=1e-5)


@pytest.mark.parametrize("seed", range(6))
def test_ours_matches_brute_force_on_tiny_ragged_batches(seed):
    # Reference: explicit enumeration of every alignment (Graves 2012 definition).
    gen = torch.Generator().manual_seed(seed)
    B, T, U, V = 4, 4, 3, 3 + seed % 2
    logits, targets, logit_lengths, target_lengths = _random_batch(gen, B, T, U, V, torch.float64, full=False)
    ours = transducer_loss(logits, targets, logit_lengths, target_lengths, reduction="none")
    for b in range(B):
        Tb, Ub = int(logit_lengths[b]), int(target_lengths[b])
        logprobs = torch.log_softmax(logits[b, :Tb, : Ub + 1], -1)
        expected = brute_force_loss(logprobs, targets[b, :Ub].tolist())
        assert ours[b].item() == pytest.approx(expected, abs=1e-10), (b, Tb, Ub)


@pytest.mark.parametrize("seed,blank", [(0, BLANK), (1, BLANK), (2, BLANK), (3, 6)])
def test_ours_matches_torchaudio_values_and_gradients(seed, blank):
    # Reference: torchaudio.functional.rnnt_loss. It runs in float32 only on CPU
    # ("logits must be float32 or float16"), so float32 with atol 1e-4.
    gen = torch.Generator().manual_seed(seed)
    B, T, U, V = 5, 12, 7, 7
    logits, targets, logit_lengths, target_lengths = _random_batch(gen, B, T, U, V)
    if blank != BLANK:
        targets = torch.randint(0, V - 1, (B, U), generator=gen)  # labels 0..5, blank is 6
    results = {}
    for implementation in ("ours", "torchaudio"):
        x = logits.clone().requires_grad_(True)
        losses = transducer_loss(x, targets, logit_lengths, target_lengths, blank=blank,
                                 reduction="none", implementation=implementation)
        weights = torch.arange(1.0, B + 1)  # a different weight per utterance exercises grad_out
        (losses * weights).sum().backward()
        results[implementation] = (losses.detach(), x.grad)
    (loss_a, grad_a), (loss_b, grad_b) = results["ours"], results["torchaudio"]
    torch.testing.assert_close(loss_a, loss_b, atol=1e-4, rtol=1e-5)
    torch.testing.assert_close(grad_a, grad_b, atol=1e-4, rtol=1e-4)


@pytest.mark.parametrize("reduction", ["mean", "sum", "none"])
def test_reductions_match_torchaudio(reduction):
    # Reference: torchaudio.functional.rnnt_loss; "mean" is the mean over utterances there.
    gen = torch.Generator().manual_seed(7)
    logits, targets, logit_lengths, target_lengths = _random_batch(gen, 3, 6, 4, 5)
    ours = transducer_loss(logits, targets, logit_lengths, target_lengths, reduction=reduction)
    theirs = torchaudio_functional.rnnt_loss(
        logits, targets.int(), logit_lengths.int(), target_lengths.int(), blank=BLANK, reduction=reduction
    )
    torch.testing.assert_close(ours, theirs, atol=1e-4, rtol=1e-5)


def test_extra_padding_changes_nothing():
    # Invariant (common practice): padding must not leak. Pad beyond the longest lengths
    # with large random values and garbage target ids; loss and real-part gradients stay.
    gen = torch.Generator().manual_seed(3)
    B, T, U, V = 4, 7, 5, 6
    logits, targets, logit_lengths, target_lengths = _random_batch(gen, B, T, U, V, torch.float64)
    padded = 50 * torch.randn(B, T + 3, U + 3, V, generator=gen, dtype=torch.float64)
    for b in range(B):  # also scribble inside the batch's own padding
        Tb, Ub = int(logit_lengths[b]), int(target_lengths[b])
        padded[b, :Tb, : Ub + 1] = logits[b, :Tb, : Ub + 1]
    padded_targets = torch.full((B, U + 2), -1)
    for b in range(B):
        padded_targets[b, : int(target_lengths[b])] = targets[b, : int(target_lengths[b])]

    def loss_and_grad(x, y):
        x = x.clone().requires_grad_(True)
        loss = transducer_loss(x, y, logit_lengths, target_lengths, reduction="sum")
        loss.backward()
        return loss.detach(), x.grad

    loss_a, grad_a = loss_and_grad(logits, targets)
    loss_b, grad_b = loss_and_grad(padded, padded_targets)
    torch.testing.assert_close(loss_a, loss_b, atol=1e-10, rtol=0)
    for b in range(B):
        Tb, Ub = int(logit_lengths[b]), int(target_lengths[b])
        torch.testing.assert_close(grad_a[b, :Tb, : Ub + 1], grad_b[b, :Tb, : Ub + 1], atol=1e-10, rtol=0)
        outside = torch.ones_like(grad_b[b], dtype=torch.bool)
        outside[:Tb, : Ub + 1] = False
        assert grad_b[b][outside].abs().max() == 0


def test_torchaudio_wrapper_trims_extra_padding():
    # Reference: torchaudio.functional.rnnt_loss on the tightly padded batch; the wrapper
    # must trim padding beyond the longest lengths (torchaudio requires it).
    gen = torch.Generator().manual_seed(4)
    logits, targets, logit_lengths, target_lengths = _random_batch(gen, 3, 5, 3, 4)
    padded = torch.nn.functional.pad(logits, (0, 0, 0, 2, 0, 3), value=9.0)  # (3, 8, 6, 4)
    padded_targets = torch.nn.functional.pad(targets, (0, 2), value=-1)
    tight = torchaudio_functional.rnnt_loss(logits, targets.int(), logit_lengths.int(), target_lengths.int(),
                                            blank=BLANK, reduction="none")
    wrapped = transducer_loss(padded, padded_targets, logit_lengths, target_lengths, reduction="none",
                              implementation="torchaudio")
    torch.testing.assert_close(wrapped, tight)


def test_batch_of_one_equals_batched_result():
    # Invariant (common practice): utterances in a batch do not see each other.
    gen = torch.Generator().manual_seed(11)
    logits, targets, logit_lengths, target_lengths = _random_batch(gen, 4, 9, 6, 5, torch.float64)
    batched = transducer_loss(logits, targets, logit_lengths, target_lengths, reduction="none")
    for b in range(4):
        Tb, Ub = int(logit_lengths[b]), int(target_lengths[b])
        alone = transducer_loss(logits[b : b + 1, :Tb, : Ub + 1], targets[b : b + 1, :Ub],
                                logit_lengths[b : b + 1], target_lengths[b : b + 1], reduction="none")
        torch.testing.assert_close(batched[b : b + 1], alone, atol=1e-12, rtol=0)


def test_gradcheck_of_the_recursion():
    # Reference: finite differences (torch.autograd.gradcheck) in float64, ragged batch.
    gen = torch.Generator().manual_seed(5)
    B, T, U, V = 3, 4, 3, 4
    logits, targets, logit_lengths, target_lengths = _random_batch(gen, B, T, U, V, torch.float64)
    logit_lengths[:] = torch.tensor([4, 2, 3])
    target_lengths[:] = torch.tensor([1, 3, 0])
    lp_blank, lp_label = gather_logprobs(logits, targets)
    lp_blank, lp_label = lp_blank.detach().requires_grad_(True), lp_label.detach().requires_grad_(True)
    assert torch.autograd.gradcheck(
        lambda a, b: _TransducerLoss.apply(a, b, logit_lengths, target_lengths), (lp_blank, lp_label)
    )


def test_gradcheck_of_gather_logprobs():
    # Reference: finite differences (torch.autograd.gradcheck) for the fused backward.
    gen = torch.Generator().manual_seed(6)
    logits = torch.randn(2, 3, 3, 4, generator=gen, dtype=torch.float64, requires_grad=True)
    targets = torch.tensor([[1, 3], [2, 2]])
    assert torch.autograd.gradcheck(lambda x: gather_logprobs(x, targets), (logits,))
    assert torch.autograd.gradcheck(lambda x: gather_logprobs(x, targets, blank=2), (logits,))


def test_logsumexp_survives_overflow_rows():
    # Reference: torch.logsumexp; rows far above the shift element take the fallback path.
    x = torch.tensor([[0.0, 1.0, -3.0], [0.0, 200.0, 150.0], [-1e4, 5.0, 5.0]])
    torch.testing.assert_close(_logsumexp(x, x[:, 0]), torch.logsumexp(x, -1))


def test_single_frame_no_label():
    # From the definition: T = 1, U = 0 leaves one alignment, the single blank.
    lp_blank = torch.log(torch.tensor([[[0.25]]], dtype=torch.float64))
    loss = transducer_loss_from_logprobs(lp_blank, lp_blank[:, :, :0], torch.tensor([1]), torch.tensor([0]))
    assert loss.item() == pytest.approx(math.log(4))


def test_time_losses_reports_agreeing_implementations():
    figures = time_losses(B=2, T=5, U=4, V=6, repeats=1)
    assert set(figures) >= {"loss_ms_ours", "loss_ms_torchaudio", "max_abs_diff"}
    assert figures["max_abs_diff"] < 1e-4


@pytest.mark.parametrize(
    "kwargs,message",
    [
        ({"implementation": "fast"}, "ours, torchaudio"),
        ({"reduction": "average"}, "mean, sum, none"),
        ({"blank": 9}, "blank index 9"),
    ],
)
def test_unknown_options_are_clear_errors(kwargs, message):
    logits, targets = _worked_logits()
    with pytest.raises(ValueError, match=message):
        transducer_loss(logits, targets, torch.tensor([2]), torch.tensor([1]), **kwargs)


@pytest.mark.parametrize(
    "targets,logit_lengths,target_lengths,message",
    [
        ([[0]], [2], [1], "other than blank"),
        ([[1]], [3], [1], "logit_lengths must lie in"),
        ([[1]], [0], [1], "logit_lengths must lie in"),
        ([[1]], [2], [2], "target_lengths must lie in"),
    ],
)
def test_bad_inputs_are_clear_errors(targets, logit_lengths, target_lengths, message):
    logits, _ = _worked_logits()
    with pytest.raises(ValueError, match=message):
        transducer_loss(logits, torch.tensor(targets), torch.tensor(logit_lengths), torch.tensor(target_lengths))
