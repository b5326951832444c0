"""An adapter that runs torchaudio's `RNNTBeamSearch` (torchaudio.models) on our model: the reference.

torchaudio's search (one utterance at a time) expects blank as the LAST output
index, predictor states as lists of tensors with the hypotheses along the first
dimension, and `transcribe` / `predict` / `join` methods. The adapter maps our
token ids (blank = 0) to theirs (blank = V-1) and back, and calls our encoder,
predictor and joiner unchanged. Only the plain model: biasing inputs and
boosting are ours alone. Used by the tests and the fusion benchmark to check
and time our beam search against it.
"""

from __future__ import annotations

import torch
from torch import Tensor, nn

from tinyrnnt.text import BLANK, VOCAB_SIZE

# their index i <-> our token OURS[i]: non-blank tokens first, blank last
OURS = torch.tensor(list(range(1, VOCAB_SIZE)) + [BLANK])
THEIRS_BLANK = VOCAB_SIZE - 1


class ReferenceAdapter(nn.Module):
    def __init__(self, model):
        super().__init__()
        if model.bias is not None:
            raise ValueError("the reference beam search runs plain models only (no biasing input)")
        self.model = model

    def transcribe(self, feats: Tensor, lengths: Tensor):
        return self.model.encoder(feats, lengths)

    def predict(self, tokens: Tensor, lengths: Tensor, state=None):
        ours = OURS[tokens]  # (B, 1)
        stateless = self.model.cfg.stateless_predictor
        if state is not None:  # theirs: [[component, ...]], hypotheses along the first dimension
            state = state[0][0] if stateless else tuple(s.transpose(0, 1).contiguous() for s in state[0])
        out, new = self.model.predictor.step(ours, state)
        packed = [[new]] if stateless else [[s.transpose(0, 1) for s in new]]  # LSTM (layers, B, D) -> (B, ...)
        return out, lengths, packed

    def join(self, enc: Tensor, enc_lens: Tensor, pred: Tensor, pred_lens: Tensor):
        logits = self.model.joiner(enc, pred)  # (B, T, U, V), our order
        return logits[..., OURS], enc_lens, pred_lens


def reference_beam_search(model, feats: Tensor, feat_lens: Tensor, beam: int = 4, max_symbols: int = 4) -> list[list[int]]:
    """Best token ids per utterance from torchaudio's RNNTBeamSearch, ranked by total score like ours."""
    from torchaudio.models import RNNTBeamSearch

    search = RNNTBeamSearch(ReferenceAdapter(model), blank=THEIRS_BLANK, step_max_tokens=max_symbols,
                            hypo_sort_key=lambda h: h[3])  # rank by score, as ours does (theirs: per token)
    out = []
    with torch.no_grad():
        for b in range(feats.shape[0]):
            n = int(feat_lens[b])
            hyps = search(feats[b:b + 1, :n], feat_lens[b:b + 1], beam)
            best = max(hyps, key=lambda h: h[3])
            out.append([int(OURS[t]) for t in best[0][1:]])  # drop the start symbol
    return out
