"""The LightningModule: the transducer, its loss and optimiser, trained by a Trainer.

Everything the training step computes is plain PyTorch reachable without a
Trainer (`TransducerTask._common_step` calls the model and the loss); this
module only adds the schedule, logging, checkpoint contents and validation CER.
Trainer settings (accelerator, devices, precision, strategy) come from the
recipe unchanged, so the same recipe runs on GPUs or several machines.
"""

from __future__ import annotations

import time

import lightning as L
import torch

from tinyrnnt.decode.greedy import greedy_decode
from tinyrnnt.model.training import TrainConfig, lr_factor, spec_mask  # noqa: F401  (TrainConfig re-exported)
from tinyrnnt.model.transducer import Transducer, training_flops
from tinyrnnt.score import cer
from tinyrnnt.text import decode


class TransducerTask(L.LightningModule):
    def __init__(self, config: dict):
        """config: the experiment config as a plain dict (saved in every checkpoint)."""
        super().__init__()
        from tinyrnnt.experiment import experiment_from_dict

        self.save_hyperparameters({"config": config})
        self.cfg = experiment_from_dict(config)
        self.model = Transducer(self.cfg.model, self.cfg.bias if self.cfg.bias.kind != "none" else None)
        self.train_seconds = 0.0
        # Training this model descends from (set from the init_from checkpoint's history):
        # optimiser steps and training seconds before this run, and the runs they came from.
        self.prior = {"steps": 0, "seconds": 0.0, "runs": []}
        self.precision_used = "fp32"  # set by lab.train from train.precision (and the Trainer's own setting)
        self._t0 = None

    def _common_step(self, batch, stage: str):
        feats = batch["feats"]
        if stage == "train":
            feats = spec_mask(feats, batch["feat_lens"], self.cfg.train)
        out = self.model.losses(feats, batch["feat_lens"], batch["targets"], batch["target_lens"],
                                batch.get("lists"), implementation=self.cfg.train.loss_implementation)
        B = len(batch["ids"])
        # validation figures are averaged over processes under distributed training (each sees its share)
        self.log(f"{stage}_loss", out["rnnt"], prog_bar=True, batch_size=B, sync_dist=stage == "valid")
        if "ctc" in out:
            self.log(f"{stage}_ctc", out["ctc"], batch_size=B, sync_dist=stage == "valid")
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
        self.log("valid_cer", errs / max(chars, 1), prog_bar=True, batch_size=chars, reduce_fx="mean", sync_dist=True)
        return loss

    def configure_optimizers(self):
        t = self.cfg.train
        bias = [p for n, p in self.named_parameters() if n.startswith("model.bias.")]
        rest = [p for n, p in self.named_parameters() if not n.startswith("model.bias.")]
        groups = [{"params": rest}] + ([{"params": bias, "lr": t.learning_rate * t.bias_lr_scale}] if bias else [])
        opt = torch.optim.Adam(groups, lr=t.learning_rate)

        sched = torch.optim.lr_scheduler.LambdaLR(opt, lambda step: lr_factor(step, t))
        return {"optimizer": opt, "lr_scheduler": {"scheduler": sched, "interval": "step"}}

    def history(self, steps: int) -> dict:
        """Total training behind the weights after `steps` steps of this run, summed through init_from."""
        own = {"run": self.cfg.run_dir, "steps": int(steps), "seconds": round(self.train_seconds, 2),
               "precision": self.precision_used}
        return {"steps": self.prior["steps"] + own["steps"],
                "seconds": round(self.prior["seconds"] + self.train_seconds, 2),
                "runs": self.prior["runs"] + [own]}

    def on_save_checkpoint(self, checkpoint):
        checkpoint["train_seconds"] = self.train_seconds
        checkpoint["prior"] = self.prior
        checkpoint["history"] = self.history(self.trainer.global_step)

    def on_load_checkpoint(self, checkpoint):
        self.train_seconds = float(checkpoint["train_seconds"])
        self.prior = checkpoint["prior"]


class TrainingClock(L.Callback):
    """Stops when the training-time cap is spent (0 = no cap); snapshots weights every few training
    minutes. The step budget is the Trainer's own `max_steps`.

    Validation time is not counted, so "minutes of training" means optimiser work.
    """

    def __init__(self, minutes: float, snapshot_minutes: float):
        self.budget = minutes * 60.0 if minutes > 0 else float("inf")
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
