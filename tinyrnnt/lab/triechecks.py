"""Checks of the trie benchmark that are not evaluation: the cue's cost against list size, and a
repeated short run for determinism."""

from __future__ import annotations

from pathlib import Path

from tinyrnnt.lab.evaluate import evaluate


def cue_cost_ratio(repeats: int = 9) -> tuple[float, float, float]:
    """Median-of-medians ms of the batched training cue at N = 10 and N = 5000, and their ratio.

    After an untimed warm-up, the two sizes are timed in alternation (one seed each, in
    turn), so a slow spell of the machine falls on both rather than on one of them.
    """
    import statistics

    from tinyrnnt.bias.trie import time_cue

    time_cue(10, repeats=3), time_cue(5000, repeats=3)  # warm-up: first calls in a process are slower
    small, large = [], []
    for k in range(repeats):
        small.append(time_cue(10, seed=k))
        large.append(time_cue(5000, seed=k))
    s, g = statistics.median(small), statistics.median(large)
    return s, g, g / s


def _without_timing(summary: dict) -> dict:
    return {k: v for k, v in summary.items() if k not in ("decode_seconds", "rtf")}


def repeat_check(cfg, start_checkpoint: str, corpus: str, folder: Path, steps: int = 20) -> bool:
    """Two short runs of the same arm with the same seed and steps: identical weights and metrics?"""
    import torch

    from tinyrnnt import config as C
    from tinyrnnt.data import CorpusSplit
    from tinyrnnt.lab.train import load_model, train

    outcomes = []
    for name in ("a", "b"):
        c = C.apply_overrides(cfg, [f"run_dir={folder / name}", f"train.steps={steps}", "train.minutes=0",
                                    f"train.init_from={start_checkpoint}", "train.validate_every_steps=100000"])
        result = train(c, quiet=True)
        model = load_model(result.last_checkpoint)[0]
        _, summary = evaluate(model, CorpusSplit(corpus, "test_unseen", limit=200), list_size=100)
        outcomes.append((model.state_dict(), _without_timing(summary)))
    (wa, sa), (wb, sb) = outcomes
    return all(torch.equal(wa[k], wb[k]) for k in wa) and sa == sb
