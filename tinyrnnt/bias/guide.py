"""Guided attention: which list entry the attention should read at each label position.

A training-time loss on the attention weights over the biasing list (the
guided attention loss of Tang et al., ICASSP 2024; written from memory): at a
label position whose next token continues a listed word of the transcript,
the target is that entry; where the next token is outside any listed word, the
target is the no-bias entry. Without it, the attention of a briefly fine-tuned
model learns to rest on the no-bias entry everywhere (README, "Attention over
the list").

Positions are skipped (target IGNORE) where the next token is a listed word's
first token (with the predictor state as query nothing yet says which entry
comes) and past the transcript's end. An entry is matched as a whole word of
the transcript; entries holding spaces are matched word by word.
"""

from __future__ import annotations

import torch
from torch import Tensor

from tinyrnnt.text import SPACE, decode

IGNORE = -100  # torch.nn.functional.nll_loss's default ignore_index
MAX_WORDS = 4  # longest entry, in words, that is looked for in a transcript


def guide_targets(lists: list[list[str]], targets: Tensor, target_lens: Tensor) -> Tensor:
    """(B, U+1) entry to attend to at each label position: 0 the no-bias entry, 1 + i the list's
    entry i, IGNORE where no target is set.

    >>> from tinyrnnt.text import encode
    >>> t = torch.tensor([encode("hi zed")])
    >>> guide_targets([["zed", "amy"]], t, torch.tensor([6])).tolist()
    [[0, 0, 0, -100, 1, 1, -100]]
    """
    B, U = targets.shape
    out = torch.full((B, U + 1), IGNORE, dtype=torch.long)
    for b, lst in enumerate(lists):
        n = int(target_lens[b])
        out[b, :n] = 0
        where = {w: i + 1 for i, w in enumerate(lst)}
        if not where:
            continue
        tokens = targets[b, :n].tolist()
        words, start = [], 0  # (first token, end) of each word of the transcript
        for k, tok in enumerate(tokens + [SPACE]):
            if tok == SPACE:
                if k > start:
                    words.append((start, k))
                start = k + 1
        for i in range(len(words)):
            for j in range(i, min(i + MAX_WORDS, len(words))):
                phrase = decode(tokens[words[i][0]: words[j][1]])
                if phrase in where:
                    first, end = words[i][0], words[j][1]
                    out[b, first] = IGNORE
                    out[b, first + 1: end] = where[phrase]
    return out


def guide_loss(weights: Tensor, target: Tensor) -> Tensor:
    """Mean negative log attention weight on the target entry: weights (B, U+1, N+1), target (B, U+1)."""
    logw = torch.log(weights.clamp_min(1e-8))
    return torch.nn.functional.nll_loss(logw.reshape(-1, logw.shape[-1]), target.reshape(-1), ignore_index=IGNORE)
