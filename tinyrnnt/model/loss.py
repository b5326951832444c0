"""The transducer (RNN-T) loss: -log P(y | x) summed over every alignment.

Standard loss from Graves 2012, "Sequence Transduction with Recurrent Neural
Networks". The joiner gives, at every lattice node (t, u), a
distribution over V tokens; blank (index 0, `tinyrnnt.text.BLANK`) moves
(t, u) -> (t + 1, u), the next reference label y_{u+1} moves (t, u) -> (t, u + 1),
and log P(y | x) = alpha(T - 1, U) + lp_blank(T - 1, U).

Our implementation runs the forward (alpha) and backward (beta) recursions in
log space over anti-diagonals n = t + u, so there are T + U small vectorised
steps (each over the batch and the diagonal) instead of T * U scalar ones, and
gives the analytic gradient (Graves 2012, training section) instead of differentiating
through the recursion. torchaudio's `rnnt_loss` is wrapped as the outside reference.

Dimensions: B batch, T frames, U labels (U + 1 label-history positions), V
tokens with blank, R = T + U + 1 anti-diagonals of lattice nodes.

This module deliberately computes only the exact loss over the full lattice:
no gradient clamping, no regularisers, no pruning of the lattice. Logits are
assumed finite.
"""

from __future__ import annotations

import itertools
import math
import time

import torch
from torch import Tensor

from tinyrnnt.text import BLANK

IMPLEMENTATIONS = ("ours", "torchaudio")
REDUCTIONS = ("mean", "sum", "none")
NEG_INF = float("-inf")


def _logsumexp(x: Tensor, shift: Tensor) -> Tensor:
    """logsumexp over the last dimension, shifted by `shift`, one element of each row.

    >>> x = torch.tensor([[0.0, 1.0, 2.0], [0.0, 500.0, 0.0]])
    >>> torch.allclose(_logsumexp(x, x[:, 0]), torch.logsumexp(x, -1))
    True
    """
    # subtle: torch.logsumexp shifts by the row maximum, and a maximum over a short
    # last dimension is slow. Any element of the row is as good a shift: the sum is
    # at least exp(0) = 1, so it cannot underflow, and a row whose sum overflows
    # (some logit far above the shift) is redone with torch.logsumexp.
    total = (x - shift[..., None]).exp_().sum(-1)  # (...,)
    out = total.log_().add_(shift)
    bad = ~torch.isfinite(out)
    if bool(bad.any()):
        out[bad] = torch.logsumexp(x[bad], dim=-1)
    return out


class _GatherLogprobs(torch.autograd.Function):
    """logit - logsumexp(logits) at blank and at the next label, with a fused backward."""

    @staticmethod
    def forward(ctx, logits, targets, blank):
        B, T, U1, V = logits.shape
        norm = _logsumexp(logits, logits[..., blank])  # (B, T, U+1)
        lp_blank = logits[..., blank] - norm  # (B, T, U+1)
        index = targets.long()[:, None, :, None].expand(B, T, U1 - 1, 1)  # (B, T, U, 1)
        lp_label = logits[:, :, :-1].gather(-1, index).squeeze(-1) - norm[:, :, :-1]  # (B, T, U)
        ctx.save_for_backward(logits, norm, index)
        ctx.blank = blank
        return lp_blank, lp_label

    @staticmethod
    @torch.autograd.function.once_differentiable
    def backward(ctx, grad_blank, grad_label):
        logits, norm, index = ctx.saved_tensors
        # d(logit_k - logsumexp)/d logit_j = [j == k] - softmax_j: one pass over (B, T, U+1, V)
        # instead of the several full-size temporaries plain autograd would make
        total = grad_blank.clone()  # (B, T, U+1)
        total[:, :, :-1] += grad_label
        grad = logits - norm[..., None]  # (B, T, U+1, V)
        grad.exp_().mul_(total.neg_()[..., None])
        grad[..., ctx.blank] += grad_blank
        grad[:, :, :-1].scatter_add_(-1, index, grad_label[..., None])
        return grad, None, None


def gather_logprobs(logits: Tensor, targets: Tensor, blank: int = BLANK) -> tuple[Tensor, Tensor]:
    """Blank and next-label log-probabilities at every lattice node.

    logits (B, T, U+1, V), targets (B, U) -> lp_blank (B, T, U+1), lp_label (B, T, U),
    where lp_label[b, t, u] = log p(targets[b, u] | t, u). Computed as
    logit - logsumexp(logits), so the full log-softmax is never stored;
    differentiable (w.r.t. logits) through a fused backward.

    >>> logits = torch.log(torch.tensor([[[[0.5, 0.25, 0.25], [0.5, 0.5, 0.0]]]]))
    >>> lp_blank, lp_label = gather_logprobs(logits, torch.tensor([[2]]))
    >>> lp_blank.exp(), lp_label.exp()
    (tensor([[[0.5000, 0.5000]]]), tensor([[[0.2500]]]))
    """
    B, T, U1, V = logits.shape
    if targets.shape != (B, U1 - 1):
        raise ValueError(
            f"targets have shape {tuple(targets.shape)}; expected (B, U) = {(B, U1 - 1)} "
            f"to match logits of shape {tuple(logits.shape)}"
        )
    return _GatherLogprobs.apply(logits, targets, blank)


def _skew(x: Tensor, ok: Tensor, rows: int, left: int, right: int) -> Tensor:
    """(B, T, W) -> (rows, B, left + W + right) with out[t + u, b, left + u] = x[b, t, u] where ok, else -inf.

    One strided copy: in the output, x[b, t, u] sits at offset
    (t + u) * B * Wd + b * Wd + left + u = t * (B * Wd) + b * Wd + u * (B * Wd + 1) + left.
    `rows` must be at least T + W - 1, the number of anti-diagonals.
    """
    B, T, W = x.shape
    Wd = left + W + right
    out = x.new_full((rows, B, Wd), NEG_INF)
    view = out.as_strided((B, T, W), (Wd, B * Wd, B * Wd + 1), left)
    torch.where(ok, x, out.new_tensor(NEG_INF), out=view)
    return out


def _unskew(d: Tensor, T: int) -> Tensor:
    """(rows, B, W) -> a (B, T, W) view with out[b, t, u] = d[t + u, b, u]; the inverse of `_skew`."""
    _, B, W = d.shape
    return d.contiguous().as_strided((B, T, W), (W, B * W, B * W + 1))


def _lattice(lp_blank: Tensor, lp_label: Tensor, T_b: Tensor, U_b: Tensor):
    """Skew the log-probs onto anti-diagonals n = t + u and mask every move outside each utterance.

    Returns blank_d (R - 1, B, U+1), blank move from the node on diagonal n,
    column u; label_d (R - 1, B, U+2), label move from the node in column c - 1
    (columns 0 and U+1 are -inf guards); R = T + U + 1 diagonals of nodes.
    """
    _, T, U1 = lp_blank.shape
    dev = lp_blank.device
    t = torch.arange(T, device=dev)[None, :, None]  # (1, T, 1)
    u = torch.arange(U1, device=dev)[None, None, :]  # (1, 1, U+1)
    Tb, Ub = T_b[:, None, None], U_b[:, None, None]  # (B, 1, 1)
    # subtle: the final blank from (T_b - 1, U_b) is kept as a move to an extra end
    # node (T_b, U_b); then log P = alpha(end) and beta(end) = 0, with no special case
    # for the last frame. Every other blank needs t < T_b - 1, every label t < T_b and
    # u < U_b; masking them (rather than trusting padding) keeps padding from leaking.
    blank_ok = ((t < Tb - 1) & (u <= Ub)) | ((t == Tb - 1) & (u == Ub))  # (B, T, U+1)
    label_ok = (t < Tb) & (u[:, :, :-1] < Ub)  # (B, T, U)
    rows = T + U1 - 1  # diagonals holding a move
    blank_d = _skew(lp_blank, blank_ok, rows, 0, 0)  # (R-1, B, U+1)
    label_d = _skew(lp_label, label_ok, rows, 1, 1)  # (R-1, B, U+2)
    return blank_d, label_d


def _alpha(blank_d: Tensor, label_d: Tensor, last: int) -> Tensor:
    """Forward variables on diagonals: alpha_d (R, B, U+1), alpha_d[0, :, 0] = 0, up to diagonal `last`."""
    rows, B, U1 = blank_d.shape
    alpha = blank_d.new_full((rows + 1, B, U1 + 1), NEG_INF)  # column 0 is a -inf guard for u - 1
    alpha[0, :, 1] = 0.0
    stay = blank_d.new_empty(B, U1)
    move = blank_d.new_empty(B, U1)
    # one view per diagonal, made once: per-step slicing costs as much as the arithmetic
    alphas, blanks, labels = alpha.unbind(0), blank_d.unbind(0), label_d[:, :, :-1].unbind(0)
    for n in range(1, last + 1):
        prev = alphas[n - 1]
        # alpha(t, u) = logaddexp(alpha(t-1, u) + blank(t-1, u), alpha(t, u-1) + label(t, u-1))
        torch.add(prev[:, 1:], blanks[n - 1], out=stay)
        torch.add(prev[:, :-1], labels[n - 1], out=move)
        torch.logaddexp(stay, move, out=alphas[n][:, 1:])
    return alpha[:, :, 1:]


def _beta(blank_d: Tensor, label_d: Tensor, T_b: Tensor, U_b: Tensor) -> Tensor:
    """Backward variables on diagonals: beta_d (R, B, U+1), 0 at each end node (T_b, U_b)."""
    rows, B, U1 = blank_d.shape
    beta = blank_d.new_full((rows + 1, B, U1 + 1), NEG_INF)  # last column is a -inf guard for u + 1
    ends = T_b + U_b  # (B,) diagonal of each end node
    batch = torch.arange(B, device=beta.device)
    beta[ends, batch, U_b] = 0.0
    ending = {n: ends == n for n in set(ends.tolist())}
    stay = blank_d.new_empty(B, U1)
    move = blank_d.new_empty(B, U1)
    betas, blanks, labels = beta.unbind(0), blank_d.unbind(0), label_d[:, :, 1:].unbind(0)
    for n in range(int(ends.max()) - 1, -1, -1):
        nxt, out = betas[n + 1], betas[n][:, :-1]
        # beta(t, u) = logaddexp(blank(t, u) + beta(t+1, u), label(t, u) + beta(t, u+1))
        torch.add(nxt[:, :-1], blanks[n], out=stay)
        torch.add(nxt[:, 1:], labels[n], out=move)
        torch.logaddexp(stay, move, out=out)
        if n in ending:
            # subtle: an utterance shorter than the longest has its end node on this
            # diagonal; the recursion gives -inf there (no move leaves it), so put 0 back
            done = ending[n]
            out[done, U_b[done]] = 0.0
    return beta[:, :, :-1]


class _TransducerLoss(torch.autograd.Function):
    """-log P(y | x) from blank and label log-probs, with the analytic gradient."""

    @staticmethod
    def forward(ctx, lp_blank, lp_label, logit_lengths, target_lengths):
        B, T, U1 = lp_blank.shape
        T_b, U_b = logit_lengths.long().to(lp_blank.device), target_lengths.long().to(lp_blank.device)
        Tm, Um = int(T_b.max()), int(U_b.max())  # work only on the largest real lattice
        with torch.no_grad():
            blank_d, label_d = _lattice(lp_blank[:, :Tm, : Um + 1], lp_label[:, :Tm, :Um], T_b, U_b)
            alpha = _alpha(blank_d, label_d, int((T_b + U_b).max()))  # (R, B, U+1)
            log_p = alpha[T_b + U_b, torch.arange(B, device=alpha.device), U_b]  # (B,)
        ctx.save_for_backward(blank_d, label_d, alpha, log_p, T_b, U_b)
        ctx.sizes = (T, U1)
        return -log_p

    @staticmethod
    @torch.autograd.function.once_differentiable
    def backward(ctx, grad_out):
        blank_d, label_d, alpha, log_p, T_b, U_b = ctx.saved_tensors
        T, U1 = ctx.sizes
        B, Tm, Um = log_p.shape[0], int(T_b.max()), int(U_b.max())
        beta = _beta(blank_d, label_d, T_b, U_b)  # (R, B, U+1)
        # Graves 2012 (training): d(-log P)/d lp of a move = -alpha * p(move) * beta / P,
        # minus the share of P(y|x) carried by the paths through that move
        log_p = log_p[None, :, None]  # (1, B, 1)
        g = -grad_out[None, :, None]  # (1, B, 1)
        g_blank = torch.exp(alpha[:-1] + blank_d + beta[1:] - log_p) * g  # (R-1, B, U+1)
        g_label = torch.exp(alpha[:-1, :, :-1] + label_d[:, :, 1:-1] + beta[1:, :, 1:] - log_p) * g  # (R-1, B, U)
        grad_blank = blank_d.new_zeros(B, T, U1)  # zero outside each lattice
        grad_label = blank_d.new_zeros(B, T, U1 - 1)
        grad_blank[:, :Tm, : Um + 1] = _unskew(g_blank, Tm)
        grad_label[:, :Tm, :Um] = _unskew(g_label, Tm)
        return grad_blank, grad_label, None, None


def _check_lengths(B: int, T: int, U: int, logit_lengths: Tensor, target_lengths: Tensor) -> None:
    for name, lengths, low, high in (("logit_lengths", logit_lengths, 1, T), ("target_lengths", target_lengths, 0, U)):
        if lengths.shape != (B,) or lengths.is_floating_point() or lengths.is_complex():
            raise ValueError(
                f"{name} has shape {tuple(lengths.shape)} and dtype {lengths.dtype}; "
                f"expected integers of shape ({B},), one length per utterance"
            )
        if B and (int(lengths.min()) < low or int(lengths.max()) > high):
            raise ValueError(
                f"{name} must lie in [{low}, {high}] (the padded size); got values from "
                f"{int(lengths.min())} to {int(lengths.max())}"
            )


def transducer_loss_from_logprobs(
    lp_blank: Tensor, lp_label: Tensor, logit_lengths: Tensor, target_lengths: Tensor
) -> Tensor:
    """Per-utterance loss -log P(y | x), shape (B,), from lp_blank (B, T, U+1) and lp_label (B, T, U).

    Utterance b uses frames t < logit_lengths[b] and labels u < target_lengths[b];
    everything else is padding: it changes neither the loss nor the gradient, and
    gets zero gradient. Worked example from the definition: one frame, no label,
    blank probability 0.5 gives -log 0.5.

    >>> lp_blank = torch.log(torch.tensor([[[0.5]]]))
    >>> transducer_loss_from_logprobs(lp_blank, lp_blank[:, :, :0], torch.tensor([1]), torch.tensor([0]))
    tensor([0.6931])
    """
    B, T, U1 = lp_blank.shape
    if lp_label.shape != (B, T, U1 - 1):
        raise ValueError(
            f"lp_label has shape {tuple(lp_label.shape)}; expected (B, T, U) = {(B, T, U1 - 1)} "
            f"to match lp_blank of shape {tuple(lp_blank.shape)}"
        )
    _check_lengths(B, T, U1 - 1, logit_lengths, target_lengths)
    if B == 0:
        return lp_blank.sum((1, 2))  # (0,), still attached to the graph
    return _TransducerLoss.apply(lp_blank, lp_label, logit_lengths, target_lengths)


def _reduce(losses: Tensor, reduction: str) -> Tensor:
    if reduction == "mean":  # mean of per-utterance losses, as torchaudio's rnnt_loss does
        return losses.mean()
    if reduction == "sum":
        return losses.sum()
    return losses


def transducer_loss(
    logits: Tensor,
    targets: Tensor,
    logit_lengths: Tensor,
    target_lengths: Tensor,
    blank: int = BLANK,
    reduction: str = "mean",
    implementation: str = "ours",
) -> Tensor:
    """Transducer loss from joiner logits (B, T, U+1, V) and padded targets (B, U).

    implementation: "ours" (anti-diagonal recursion with analytic gradient) or
    "torchaudio" (torchaudio.functional.rnnt_loss, float32 only).
    reduction: "mean" over utterances, "sum", or "none" for the (B,) losses.
    """
    if implementation not in IMPLEMENTATIONS:
        raise ValueError(f"implementation {implementation!r} is unknown; expected one of {', '.join(IMPLEMENTATIONS)}")
    if reduction not in REDUCTIONS:
        raise ValueError(f"reduction {reduction!r} is unknown; expected one of {', '.join(REDUCTIONS)}")
    if logits.dim() != 4:
        raise ValueError(f"logits have shape {tuple(logits.shape)}; expected 4 dimensions (B, T, U+1, V)")
    B, T, U1, V = logits.shape
    if targets.shape != (B, U1 - 1):
        raise ValueError(
            f"targets have shape {tuple(targets.shape)}; expected (B, U) = {(B, U1 - 1)} "
            f"to match logits of shape {tuple(logits.shape)}"
        )
    if not 0 <= blank < V:
        raise ValueError(f"blank index {blank} is outside the {V} tokens of the logits")
    _check_lengths(B, T, U1 - 1, logit_lengths, target_lengths)
    real = torch.arange(U1 - 1, device=targets.device)[None, :] < target_lengths[:, None].to(targets.device)
    bad = real & ((targets < 0) | (targets >= V) | (targets == blank))
    if bool(bad.any()):
        b, u = (int(i) for i in bad.nonzero()[0])
        raise ValueError(
            f"targets[{b}, {u}] = {int(targets[b, u])}; expected a label in [0, {V}) other than blank ({blank})"
        )
    # subtle: padding may hold any value (say -1); replace it so gathers stay in range
    targets = torch.where(real, targets, blank)
    if logits.dtype in (torch.float16, torch.bfloat16):
        logits = logits.float()  # the recursion sums hundreds of log-probs: keep 24 mantissa bits
    if implementation == "ours":
        lp_blank, lp_label = gather_logprobs(logits, targets, blank)
        losses = transducer_loss_from_logprobs(lp_blank, lp_label, logit_lengths, target_lengths)
    else:
        import torchaudio.functional

        # torchaudio wants the padded sizes to equal the longest lengths, and int32 arguments
        Tm, Um = int(logit_lengths.max()), int(target_lengths.max())
        losses = torchaudio.functional.rnnt_loss(
            logits[:, :Tm, : Um + 1].contiguous(),
            targets[:, :Um].to(torch.int32).contiguous(),
            logit_lengths.to(logits.device, torch.int32),
            target_lengths.to(logits.device, torch.int32),
            blank=blank,
            reduction="none",
        )
    return _reduce(losses, reduction)


def brute_force_loss(logprobs: Tensor, target: list[int], blank: int = BLANK) -> float:
    """-log P(y | x) for one utterance by listing every alignment (tiny cases only).

    logprobs (T, U+1, V) are normalised log-probabilities. An alignment is T blanks
    and U labels in some order, ending with a blank (Graves 2012), so
    there are C(T + U - 1, U) of them. Uniform over V = 2 tokens, T = 2, U = 1:
    two alignments of probability 1/8 each, so -log(1/4).

    >>> round(brute_force_loss(torch.full((2, 2, 2), math.log(0.5)), [1]), 6) == round(math.log(4), 6)
    True
    """
    T, U1, V = logprobs.shape
    U = len(target)
    if U1 != U + 1:
        raise ValueError(f"logprobs have {U1} label positions; expected U + 1 = {U + 1} for a target of length {U}")
    lp = logprobs.detach().double().tolist()
    path_scores = []
    for steps in itertools.combinations(range(T + U - 1), U):
        label_steps = set(steps)
        t = u = 0
        score = 0.0
        for step in range(T + U):
            if step in label_steps:
                score += lp[t][u][target[u]]
                u += 1
            else:
                score += lp[t][u][blank]
                t += 1
        path_scores.append(score)
    top = max(path_scores)
    return -(top + math.log(sum(math.exp(s - top) for s in path_scores)))


def time_losses(B: int = 32, T: int = 45, U: int = 52, V: int = 29, repeats: int = 5, seed: int = 0) -> dict:
    """Median forward+backward milliseconds of both implementations on identical random inputs.

    Lengths are ragged (the longest utterance fills the padding). Threads are left
    as the caller set them (torch.set_num_threads). Also reports the largest
    absolute difference of the per-utterance losses and of the logit gradients.
    """
    gen = torch.Generator().manual_seed(seed)
    logits = torch.randn(B, T, U + 1, V, generator=gen)
    targets = torch.randint(1, V, (B, U), generator=gen)
    logit_lengths = torch.randint(T // 2, T + 1, (B,), generator=gen)
    target_lengths = torch.randint(U // 2, U + 1, (B,), generator=gen)
    logit_lengths[0], target_lengths[0] = T, U
    results, timings = {}, {}
    for name in IMPLEMENTATIONS:
        times = []
        for _ in range(repeats + 1):  # the first run warms up
            x = logits.clone().requires_grad_(True)
            start = time.perf_counter()
            losses = transducer_loss(x, targets, logit_lengths, target_lengths, reduction="none", implementation=name)
            losses.sum().backward()
            times.append(time.perf_counter() - start)
        results[name] = (losses.detach(), x.grad)
        timings[name] = 1000 * sorted(times[1:])[len(times[1:]) // 2]
    (loss_a, grad_a), (loss_b, grad_b) = results["ours"], results["torchaudio"]
    return {
        "loss_ms_ours": timings["ours"],
        "loss_ms_torchaudio": timings["torchaudio"],
        "max_abs_diff": float((loss_a - loss_b).abs().max()),
        "max_abs_grad_diff": float((grad_a - grad_b).abs().max()),
    }
