"""Train one model from an experiment config: Trainer, callbacks, checkpoints, saved config."""

from __future__ import annotations

import shutil
import warnings
from dataclasses import dataclass
from pathlib import Path

import torch

from tinyrnnt import config as C
from tinyrnnt.data import CorpusSplit, loader
from tinyrnnt.experiment import ExperimentConfig, experiment_from_dict
from tinyrnnt.model.transducer import Transducer


class CheckpointError(ValueError):
    """A checkpoint file is missing, corrupted or does not fit the model."""


@dataclass
class TrainResult:
    run_dir: Path
    best_checkpoint: Path
    last_checkpoint: Path
    train_seconds: float
    steps: int  # this run's optimiser steps
    history: dict  # total steps and seconds behind the last checkpoint, summed through init_from
    snapshots: list  # (training seconds, state_dict) pairs
    clock: object = None  # the TrainingClock: utterances, frames, flops counted


def train(cfg: ExperimentConfig, quiet: bool = False, resume: bool = False) -> TrainResult:
    import lightning as L
    from lightning.pytorch.callbacks import EarlyStopping, ModelCheckpoint
    from lightning.pytorch.loggers import CSVLogger

    from tinyrnnt.model.lightning import TrainingClock, TransducerTask

    check_budget(cfg)
    torch.set_num_threads(cfg.train.threads)
    L.seed_everything(cfg.train.seed, verbose=False)
    run = Path(cfg.run_dir)
    ckpt_dir = run / "checkpoints"
    if not resume and any(ckpt_dir.glob("*.ckpt")):
        # A fresh run in a used run folder: keep the earlier checkpoints one generation back
        # rather than let them sit beside the new ones under the same names.
        previous = run / "checkpoints.previous"
        if previous.exists():
            shutil.rmtree(previous)
        ckpt_dir.rename(previous)
        if not quiet:
            print(f"{run}: earlier checkpoints moved to {previous}")
    ckpt_dir.mkdir(parents=True, exist_ok=True)
    C.save(cfg, run / "config.yaml")
    C.save(cfg, ckpt_dir / "config.yaml")  # the final config beside every checkpoint

    train_split = CorpusSplit(cfg.data.corpus, "train")
    valid_split = CorpusSplit(cfg.data.corpus, "valid", limit=cfg.data.valid_subset or None)
    wrap_train = wrap_valid = None
    if cfg.bias.kind != "none":
        from tinyrnnt.bias.sampler import TrainingLists

        wrap_train = TrainingLists(train_split.inventory(), cfg.bias.sampling, cfg.train.seed)

        def wrap_valid(item):
            item["list"] = valid_split.biasing_list(item["index"], cfg.bias.valid_list_size)
            return item
    train_dl = loader(train_split, cfg.data.batch_size, shuffle=True, bucket_batches=cfg.data.bucket_batches,
                      seed=cfg.train.seed, transform=wrap_train)
    valid_dl = loader(valid_split, cfg.data.eval_batch_size, transform=wrap_valid)

    task = TransducerTask(C.to_dict(cfg))
    if cfg.train.init_from:
        weights, _ = read_checkpoint(cfg.train.init_from)
        missing, unexpected = task.load_state_dict(weights, strict=False)
        if unexpected:
            raise CheckpointError(f"{cfg.train.init_from}: holds weights this model lacks: {unexpected[:5]}")
        task.prior = read_history(cfg.train.init_from)
    clock = TrainingClock(cfg.train.minutes, cfg.train.snapshot_minutes)
    best = ModelCheckpoint(dirpath=ckpt_dir, filename="best", monitor="valid_cer", mode="min", save_last=True,
                           enable_version_counter=False)
    callbacks = [clock, best]
    if cfg.train.early_stop_patience:
        callbacks.append(EarlyStopping(monitor="valid_cer", mode="min", patience=cfg.train.early_stop_patience))
    trainer_args = dict(max_epochs=cfg.train.max_epochs, max_steps=cfg.train.steps or -1,
                        deterministic=cfg.train.deterministic, val_check_interval=cfg.train.validate_every_steps,
                        check_val_every_n_epoch=None, gradient_clip_val=cfg.train.grad_clip,
                        logger=CSVLogger(run, name="logs"), callbacks=callbacks, enable_progress_bar=not quiet,
                        enable_model_summary=not quiet, num_sanity_val_steps=0, accelerator="cpu",
                        log_every_n_steps=20)
    trainer_args.update(cfg.train.trainer)  # recipe's Trainer settings win (accelerator, devices, precision...)
    trainer = L.Trainer(**trainer_args)
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=".*does not have many workers.*")
        warnings.filterwarnings("ignore", message=".*val_check_interval.*")
        warnings.filterwarnings("ignore", message=".*exists and is not empty.*")  # our config.yaml sits there
        warnings.filterwarnings("ignore", message=".*LeafSpec.*")  # Lightning-internal deprecation
        trainer.fit(task, train_dl, valid_dl, ckpt_path="last" if resume and (ckpt_dir / "last.ckpt").exists() else None)
    # subtle: Lightning writes last.ckpt at validations; the budget usually ends between two, so the
    # final weights (the ones equal-step comparisons evaluate) are saved here.
    trainer.save_checkpoint(ckpt_dir / "last.ckpt")
    return TrainResult(run, Path(best.best_model_path or ckpt_dir / "last.ckpt"), ckpt_dir / "last.ckpt",
                       task.train_seconds, trainer.global_step, task.history(trainer.global_step),
                       clock.snapshots, clock)


def check_budget(cfg: ExperimentConfig) -> None:
    t = cfg.train
    if t.steps < 0 or t.minutes < 0:
        raise C.ConfigError(f"train.steps ({t.steps}) and train.minutes ({t.minutes}) cannot be negative")
    if t.steps == 0 and t.minutes == 0:
        raise C.ConfigError("set a training budget: train.steps (optimiser steps) or train.minutes (a time cap)")


def read_history(path: str | Path) -> dict:
    """{"steps", "seconds", "runs"}: the training behind a checkpoint's weights, through init_from.

    Checkpoints written before histories were kept count their own steps and seconds only.
    """
    ckpt = torch.load(Path(path), map_location="cpu", weights_only=True)
    if "history" in ckpt:
        return ckpt["history"]
    own = {"run": str(path), "steps": int(ckpt["global_step"]), "seconds": float(ckpt["train_seconds"])}
    return {"steps": own["steps"], "seconds": own["seconds"], "runs": [own]}


def read_checkpoint(path: str | Path) -> tuple[dict, dict]:
    """(state_dict of the LightningModule, experiment config dict); loads with weights_only=True."""
    path = Path(path)
    if not path.is_file():
        raise CheckpointError(f"{path}: checkpoint not found; train a model first (`tinyrnnt train`)")
    try:
        ckpt = torch.load(path, map_location="cpu", weights_only=True)
    except Exception as err:  # noqa: BLE001 - any unpickling failure means a damaged file
        raise CheckpointError(f"{path}: not a readable checkpoint ({type(err).__name__}); "
                              "it may be truncated or from another program, retrain or pick another file") from None
    if not isinstance(ckpt, dict) or "state_dict" not in ckpt or "config" not in ckpt.get("hyper_parameters", {}):
        raise CheckpointError(f"{path}: not a tinyrnnt checkpoint (no state_dict or saved config)")
    return ckpt["state_dict"], ckpt["hyper_parameters"]["config"]


def load_model(path: str | Path) -> tuple[Transducer, ExperimentConfig, dict]:
    """The transducer of a checkpoint, its config, and the full state dict (for biasing parts)."""
    state, cfg_dict = read_checkpoint(path)
    cfg = experiment_from_dict(cfg_dict)
    model = Transducer(cfg.model, cfg.bias if cfg.bias.kind != "none" else None)
    own = {k[len("model."):]: v for k, v in state.items() if k.startswith("model.")}
    try:
        model.load_state_dict(own)
    except RuntimeError as err:
        raise CheckpointError(f"{path}: weights do not fit the model its config describes ({str(err)[:200]})") from None
    model.eval()
    return model, cfg, state
