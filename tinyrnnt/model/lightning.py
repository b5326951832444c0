"""The LightningModule: the transducer, its loss and optimiser, trained by a Trainer.

Everything the training step computes is plain PyTorch reachable without a
Trainer (`TransducerTask._common_step` calls the model and the loss); this
module only adds the schedule, logging, checkpoint contents and validation CER.
Trainer settings (accelerator, devices, precision, strategy) come from the
recipe unchanged, so the same recipe runs on GPUs or several machines.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field

import lightning as L
import torch

from tinyrnnt.decode.greedy import greedy_decode
from tinyrnnt.model.transducer import Transducer, training_flops
from tinyrnnt.score import cer
from tinyrnnt.text import decode


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
    minutes: float = 10.0  # training-time budget (validation time not counted)
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


class TransducerTask(L.LightningModule):
    def __init__(self, config: dict):
        """config: the experiment config as a plain dict (saved in every checkpoint)."""
        super().__init__()
        from tinyrnnt.experiment import experiment_from_dict

        self.save_hyperparameters({"config": config})
        self.cfg = experiment_from_dict(config)
        self.model = Transducer(self.cfg.model, self.cfg.bias if self.cfg.bias.kind != "none" else None)
        self.train_seconds = 0.0
        self._t0 = None

    def _common_step(self, batch, stage: str):
        feats = batch["feats"]
        if stage == "train":
            feats = spec_mask(feats, batch["feat_lens"], self.cfg.train)
        out = self.model.losses(feats, batch["feat_lens"], batch["targets"], batch["target_lens"],
                                batch.get("lists"), implementation=self.cfg.train.loss_implementation)
        B = len(batch["ids"])
        self.log(f"{stage}_loss", out["rnnt"], prog_bar=True, batch_size=B)
        if "ctc" in out:
            self.log(f"{stage}_ctc", out["ctc"], batch_size=B)
        return out["loss"]

    def training_step(self, batch, batch_idx):
        return self._common_step(batch, "train")

    def on_train_batch_start(self, batch, batch_idx):
        self._t0 = time.perf_counter()

    def on_train_batch_end(self, outputs, batch, batch_idx):
        self.train_seconds += time.perf_counter() - self._t0

    def validation_step(self, batch, batch_idx):
        loss = self._common_step(batch, "valid")
        biaser = self.model.bias.decoder(batch["lists"]) if self.model.bias is not None else None
        hyps = greedy_decode(self.model, batch["feats"], batch["feat_lens"], biaser=biaser)
        errs = sum(cer(r, decode(h)) * len(r) for r, h in zip(batch["texts"], hyps))
        chars = sum(len(r) for r in batch["texts"])
        self.log("valid_cer", errs / max(chars, 1), prog_bar=True, batch_size=chars, reduce_fx="mean")
        return loss

    def configure_optimizers(self):
        t = self.cfg.train
        bias = [p for n, p in self.named_parameters() if n.startswith("model.bias.")]
        rest = [p for n, p in self.named_parameters() if not n.startswith("model.bias.")]
        groups = [{"params": rest}] + ([{"params": bias, "lr": t.learning_rate * t.bias_lr_scale}] if bias else [])
        opt = torch.optim.Adam(groups, lr=t.learning_rate)

        def factor(step: int) -> float:
            if step < t.warmup_steps:
                return (step + 1) / t.warmup_steps
            decayed = 0.5 ** ((step - t.warmup_steps) / t.decay_half_life_steps)
            return max(decayed, t.min_learning_rate / t.learning_rate)

        sched = torch.optim.lr_scheduler.LambdaLR(opt, factor)
        return {"optimizer": opt, "lr_scheduler": {"scheduler": sched, "interval": "step"}}

    def on_save_checkpoint(self, checkpoint):
        checkpoint["train_seconds"] = self.train_seconds

    def on_load_checkpoint(self, checkpoint):
        self.train_seconds = float(checkpoint.get("train_seconds", 0.0))


class TrainingClock(L.Callback):
    """Stops when the training-time budget is spent; snapshots weights every few training minutes.

    Validation time is not counted, so "minutes of training" means optimiser work.
    """

    def __init__(self, minutes: float, snapshot_minutes: float):
        self.budget = minutes * 60.0
        self.every = snapshot_minutes * 60.0
        self.snapshots: list[tuple[float, dict]] = []
        self.utterances = self.frames = self.flops = 0

    def on_train_batch_end(self, trainer, task, outputs, batch, batch_idx):
        B, T, _ = batch["feats"].shape
        self.utterances += B
        self.frames += int(batch["feat_lens"].sum())
        self.flops += B * training_flops(task.cfg.model, T, batch["targets"].shape[1])  # padded = work done
        s = task.train_seconds
        if self.every > 0 and s >= (len(self.snapshots) + 1) * self.every:
            self.snapshots.append((s, {k: v.detach().clone() for k, v in task.model.state_dict().items()}))
        if s >= self.budget:
            trainer.should_stop = True


def lr_at(step: int, t: TrainConfig) -> float:
    """The schedule's learning rate at a step (for plots and tests).

    >>> lr_at(0, TrainConfig(warmup_steps=10)) == 3e-3 / 10
    True
    """
    if step < t.warmup_steps:
        return t.learning_rate * (step + 1) / t.warmup_steps
    return max(t.learning_rate * 0.5 ** ((step - t.warmup_steps) / t.decay_half_life_steps), t.min_learning_rate)

