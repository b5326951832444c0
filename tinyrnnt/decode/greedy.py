"""Batched greedy transducer decoding with a max-symbols-per-frame guard.

At each encoder frame every utterance emits the joiner's best token; a
non-blank token advances that utterance's predictor and stays on the frame,
blank moves on. At most `max_symbols` tokens per frame (the guard against a
model that never emits blank). The predictor runs only for the steps where
some utterance emitted, batched over the batch.

A biasing input can take part through `biaser` (see tinyrnnt.bias.base): it
keeps a state per utterance, gives a joiner feature for the current label
history, and advances with each emitted token, so decoding sees exactly the
cue the model was trained with. Features that read the predictor output
(`Biaser.after_predictor`, e.g. attention over the list) get each row's
current predictor output.
"""

from __future__ import annotations

import torch
from torch import Tensor

from tinyrnnt.text import BLANK


def _select(mask: Tensor, new, old):
    """Per-row choice between two states (tensors or tuples of LSTM state tensors)."""
    if isinstance(new, tuple):
        return tuple(_select(mask, n, o) for n, o in zip(new, old))
    if new.dim() == 3 and new.shape[1] == mask.shape[0] and new.shape[0] != mask.shape[0]:
        return torch.where(mask[None, :, None], new, old)  # LSTM state (layers, B, D)
    shape = (-1,) + (1,) * (new.dim() - 1)
    return torch.where(mask.view(shape), new, old)


@torch.no_grad()
def greedy_decode(model, feats: Tensor, feat_lens: Tensor, max_symbols: int = 4, biaser=None) -> list[list[int]]:
    """Token ids per utterance (blanks removed)."""
    listening = getattr(biaser, "listens", False)  # keyword spotting reads the CTC head (tinyrnnt.bias.spotting)
    enc, enc_lens, *first = (model.encoder(feats, feat_lens, keep_first=True) if listening
                             else model.encoder(feats, feat_lens))  # (B, T', De)
    B, T, _ = enc.shape
    if listening:
        from tinyrnnt.bias.spotting import ctc_log_probs

        biaser.hear(ctc_log_probs(model, first[0]), first[1], torch.arange(B), T)
    enc_p = model.joiner.enc_proj(enc)  # (B, T', Dj)
    frames = biaser.frames(enc) if biaser is not None else None  # (B, T', Dj) or None
    if frames is not None:
        enc_p = enc_p + frames
    tokens = torch.full((B, 1), BLANK, dtype=torch.long, device=feats.device)
    bstate = biaser.start(B) if biaser is not None else None
    extra = biaser.features(bstate) if biaser is not None else {}
    pred, state = model.predictor.step(tokens, None, _one_step(extra.get("predictor")))  # (B, 1, Dp)
    pred = pred[:, 0]  # (B, Dp)
    if biaser is not None:
        extra = biaser.after_predictor(extra, pred)
    label = model.joiner.label_side(pred, extra.get("joiner"))  # (B, Dj)
    emitted: list[tuple[Tensor, Tensor]] = []
    for t in range(T):
        still = t < enc_lens  # (B,)
        if not still.any():
            break
        if biaser is not None and biaser.set_frame(t):  # features that read the frame: read them again
            extra = biaser.after_predictor(biaser.features(bstate), pred)
            label = model.joiner.label_side(pred, extra.get("joiner"))
        for _ in range(max_symbols):
            hidden = torch.tanh(enc_p[:, t] + label)  # (B, Dj)
            logits = model.token_logits(hidden, extra.get("logits"))  # (B, V)
            best = logits.argmax(-1)  # (B,)
            emit = still & (best != BLANK)
            if not emit.any():
                break
            emitted.append((emit, best))
            if biaser is not None:
                bstate = biaser.advance(bstate, best, emit)
                extra = biaser.features(bstate)
            new_pred, new_state = model.predictor.step(best[:, None], state, _one_step(extra.get("predictor")))
            if B == 1 or bool(emit.all()):  # nothing to keep from the old state (always so at batch 1)
                state, pred = new_state, new_pred[:, 0]
            else:
                state, pred = _select(emit, new_state, state), _select(emit, new_pred[:, 0], pred)
            # subtle: rows that did not emit keep their biaser state, so features(bstate) gives them
            # their old features, and with their old predictor output the same label as before
            if biaser is not None:
                extra = biaser.after_predictor(extra, pred)
            label = model.joiner.label_side(pred, extra.get("joiner"))  # (B, Dj)
            still = emit
    if not emitted:
        return [[] for _ in range(B)]
    masks = torch.stack([m for m, _ in emitted]).T.cpu()  # (B, steps)
    toks = torch.stack([k for _, k in emitted]).T.cpu()  # (B, steps)
    return [toks[b][masks[b]].tolist() for b in range(B)]


def _one_step(x: Tensor | None) -> Tensor | None:
    return None if x is None else x[:, None]  # (B, E) -> (B, 1, E)
