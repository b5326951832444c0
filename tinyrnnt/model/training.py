"""Training settings, the learning-rate schedule and feature masking: plain Python and PyTorch.

They sit below both the experiment config and the LightningModule, so neither imports the other.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import torch


@dataclass
class TrainConfig:
    learning_rate: float = 3e-3
    warmup_steps: int = 200
    decay_half_life_steps: int = 2000  # after warm-up the rate halves every this many steps
    min_learning_rate: float = 1e-4
    grad_clip: float = 5.0
    time_masks: int = 0  # time masks per utterance (0 = off); masked frames set to 0 (the mean)
    time_mask_frames: int = 15
    freq_masks: int = 0
    freq_mask_bins: int = 8
    # The budget: optimiser steps (recipes of record use it), or training minutes (validation time
    # not counted) as a cap for quick looks. Training stops at whichever comes first; 0 = not set.
    steps: int = 0
    minutes: float = 10.0
    deterministic: bool = True  # deterministic kernels: same seed + same steps = same weights
    max_epochs: int = 1000
    threads: int = 2  # torch CPU threads
    seed: int = 0
    loss_implementation: str = "ours"  # or "torchaudio" (same values; see tinyrnnt.model.loss)
    validate_every_steps: int = 300
    early_stop_patience: int = 0  # validations without CER improvement before stopping (0 = off)
    snapshot_minutes: float = 1.0  # keep a copy of the weights every this many training minutes (0 = off)
    bias_lr_scale: float = 1.0  # learning-rate factor for the biasing input's own parameters
    init_from: str = ""  # checkpoint to start from (weights only; new parts keep their init);
    # in a recipe, "run:NAME" means the best checkpoint of the earlier run NAME
    trainer: dict = field(default_factory=dict)  # passed to lightning.Trainer unchanged
    # Matrix precision of training: "fp32"; "bf16" (autocast to bfloat16, the loss kept in float32);
    # "auto": bf16 on a GPU or where the CPU has bfloat16 matrix units (AMX or AVX-512 BF16), fp32
    # elsewhere. What was used is recorded in the checkpoint's history and shown in results.
    precision: str = "fp32"

    def __post_init__(self):
        from tinyrnnt.config import ConfigError, require

        require(self, "train", positive=("learning_rate", "decay_half_life_steps", "min_learning_rate", "threads",
                                         "validate_every_steps", "max_epochs"),
                at_least_zero=("warmup_steps", "grad_clip", "time_masks", "time_mask_frames", "freq_masks",
                               "freq_mask_bins", "steps", "minutes", "early_stop_patience", "snapshot_minutes",
                               "bias_lr_scale"))
        if self.precision not in PRECISIONS:
            raise ConfigError(f"train.precision must be one of {list(PRECISIONS)}, got {self.precision!r}")
        if self.loss_implementation not in ("ours", "torchaudio"):
            raise ConfigError(f"train.loss_implementation must be 'ours' or 'torchaudio', "
                              f"got {self.loss_implementation!r}")


PRECISIONS = ("fp32", "bf16", "auto")


def cpu_has_bf16_units(cpuinfo: str | None = None) -> bool:
    """Does the CPU have bfloat16 matrix instructions (AMX-BF16 or AVX-512 BF16)? Read from the
    flags of /proc/cpuinfo (Linux); False where they cannot be read.

    >>> cpu_has_bf16_units("flags : fpu sse2 avx512f amx_bf16 amx_tile"), cpu_has_bf16_units("flags : sse2")
    (True, False)
    """
    if cpuinfo is None:
        try:
            with open("/proc/cpuinfo", encoding="utf-8") as f:
                cpuinfo = f.read()
        except OSError:
            return False
    flags = {w for line in cpuinfo.splitlines() if line.startswith("flags") for w in line.split(":", 1)[-1].split()}
    return bool(flags & {"amx_bf16", "avx512_bf16"})


def chosen_precision(setting: str, accelerator: str = "cpu") -> str:
    """What train.precision means on this machine: "fp32" or "bf16"."""
    if setting != "auto":
        return setting
    import torch

    on_gpu = accelerator in ("gpu", "cuda") or (accelerator == "auto" and torch.cuda.is_available())
    return "bf16" if on_gpu or cpu_has_bf16_units() else "fp32"


def spec_mask(feats, feat_lens, cfg: TrainConfig, generator=None):
    """Time and frequency masking (SpecAugment-style, Park et al. 2019), in place on a copy."""
    if cfg.time_masks == 0 and cfg.freq_masks == 0:
        return feats
    feats = feats.clone()
    B, T, F = feats.shape
    for _ in range(cfg.time_masks):
        width = torch.randint(0, cfg.time_mask_frames + 1, (B, 1), generator=generator)
        start = (torch.rand(B, 1, generator=generator) * (feat_lens[:, None] - width).clamp(min=1)).long()
        t = torch.arange(T)[None, :]
        feats[(t >= start) & (t < start + width)] = 0.0
    for _ in range(cfg.freq_masks):
        width = torch.randint(0, cfg.freq_mask_bins + 1, (B, 1), generator=generator)
        start = (torch.rand(B, 1, generator=generator) * (F - width)).long()
        f = torch.arange(F)[None, :]
        feats.transpose(1, 2)[(f >= start) & (f < start + width)] = 0.0
    return feats


def lr_factor(step: int, t: TrainConfig) -> float:
    """Multiplier of the base learning rate at an optimiser step: linear warm-up, then halving
    every `decay_half_life_steps`, floored at `min_learning_rate`.

    >>> lr_factor(0, TrainConfig(warmup_steps=10)), lr_factor(2010, TrainConfig(warmup_steps=10))
    (0.1, 0.5)
    """
    if step < t.warmup_steps:
        return (step + 1) / t.warmup_steps
    decayed = 0.5 ** ((step - t.warmup_steps) / t.decay_half_life_steps)
    return max(decayed, t.min_learning_rate / t.learning_rate)


def lr_at(step: int, t: TrainConfig) -> float:
    """The schedule's learning rate at a step (for plots and tests).

    >>> lr_at(0, TrainConfig(warmup_steps=10)) == 3e-3 / 10
    True
    """
    return t.learning_rate * lr_factor(step, t)

