"""Train one model from an experiment config: Trainer, callbacks, checkpoints, saved config."""

from __future__ import annotations

import logging
import shutil
import warnings
from dataclasses import dataclass
from pathlib import Path

import torch

from tinyrnnt import config as C
from tinyrnnt.data import CorpusSplit, loader
from tinyrnnt.experiment import ExperimentConfig, experiment_from_dict
from tinyrnnt.files import MB, check_output_folder
from tinyrnnt.model.transducer import Transducer


class _NoAdverts(logging.Filter):
    """Drops Lightning's start-up tips about third-party services (printed at every training start)
    and its Ctrl-C notice (the command prints its own one line); while `quiet`, also its
    accelerator lines ("GPU available: False, used: False"), which a benchmark's quiet training
    printed at every arm."""

    quiet = False
    BANNERS = ("GPU available", "TPU available", "HPU available", "IPU available")

    def filter(self, record: logging.LogRecord) -> bool:
        message = record.getMessage()
        if self.quiet and message.startswith(self.BANNERS):
            return False
        return "Tip:" not in message and "Detected KeyboardInterrupt" not in message


_ADVERTS = _NoAdverts()
logging.getLogger("lightning.pytorch.utilities.rank_zero").addFilter(_ADVERTS)


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


def train(cfg: ExperimentConfig, quiet: bool = False, resume: bool = False, callbacks=()) -> TrainResult:
    """Train one model (`callbacks`: more Lightning callbacks, e.g. for checks). Everything that can
    be checked is checked before anything is written: the budget, the corpus, the model against `init_from` or the checkpoint to resume, the Trainer
    settings. A run that fails before its first checkpoint leaves no run folder behind."""
    import lightning as L
    from lightning.pytorch.callbacks import EarlyStopping, ModelCheckpoint
    from lightning.pytorch.loggers import CSVLogger

    from tinyrnnt.lab.resume import AtomicCheckpoints, ExactResume, remove_stale_temporaries
    from tinyrnnt.model.lightning import TrainingClock, TransducerTask

    check_budget(cfg)
    torch.set_num_threads(cfg.train.threads)
    L.seed_everything(cfg.train.seed, verbose=False)
    run = Path(cfg.run_dir)
    ckpt_dir = run / "checkpoints"

    train_split = CorpusSplit(cfg.data.corpus, "train")
    valid_split = CorpusSplit(cfg.data.corpus, "valid", limit=cfg.data.valid_subset or None)
    wrap_train = wrap_valid = None
    if cfg.bias.kind != "none":
        from tinyrnnt.bias.sampler import TrainingLists

        texts = [it["text"] for it in train_split.items] if cfg.bias.sampling.respell_few_shot > 0 else ()
        wrap_train = TrainingLists(train_split.inventory(), cfg.bias.sampling, cfg.train.seed, texts)

        def wrap_valid(item):
            item["list"] = valid_split.biasing_list(item["index"], cfg.bias.valid_list_size)
            return item
    train_dl = loader(train_split, cfg.data.batch_size, shuffle=True, bucket_batches=cfg.data.bucket_batches,
                      seed=cfg.train.seed, transform=wrap_train)
    valid_dl = loader(valid_split, cfg.data.eval_batch_size, transform=wrap_valid)

    task = TransducerTask(C.to_dict(cfg))
    check_output_folder(run, run_bytes(task), "run_dir")  # writable, with room for the checkpoints
    if cfg.train.init_from:
        weights, _ = read_checkpoint(cfg.train.init_from)
        try:
            missing, unexpected = task.load_state_dict(weights, strict=False)
        except RuntimeError as err:
            raise CheckpointError(f"{cfg.train.init_from}: its weights do not fit this model "
                                  f"({str(err).splitlines()[1].strip() if len(str(err).splitlines()) > 1 else err}); "
                                  "init_from needs a checkpoint of the same model sizes") from None
        if unexpected:
            raise CheckpointError(f"{cfg.train.init_from}: holds weights this model lacks: {unexpected[:5]}")
        task.prior = read_history(cfg.train.init_from)
    resume_from = ckpt_dir / "last.ckpt" if resume and (ckpt_dir / "last.ckpt").exists() else None
    if resume_from is not None:
        weights, _ = read_checkpoint(resume_from)
        try:
            TransducerTask(C.to_dict(cfg)).load_state_dict(weights)
        except RuntimeError:
            raise CheckpointError(f"{resume_from}: the settings given do not fit the checkpoint to resume "
                                  f"(model or biasing sizes differ); resume with the run's own settings "
                                  f"({run / 'config.yaml'}) or train into a new run_dir") from None
    clock = TrainingClock(cfg.train.minutes, cfg.train.snapshot_minutes)
    best = ModelCheckpoint(dirpath=ckpt_dir, filename="best", monitor="valid_cer", mode="min", save_last=True,
                           enable_version_counter=False)
    callbacks = [clock, best, ExactResume(train_dl.batch_sampler), *callbacks]
    if cfg.train.early_stop_patience:
        callbacks.append(EarlyStopping(monitor="valid_cer", mode="min", patience=cfg.train.early_stop_patience))
    trainer_args = dict(max_epochs=cfg.train.max_epochs, max_steps=cfg.train.steps or -1,
                        deterministic=cfg.train.deterministic, val_check_interval=cfg.train.validate_every_steps,
                        check_val_every_n_epoch=None, gradient_clip_val=cfg.train.grad_clip,
                        logger=CSVLogger(run, name="logs"), callbacks=callbacks, enable_progress_bar=not quiet,
                        enable_model_summary=not quiet, num_sanity_val_steps=0, accelerator="cpu",
                        log_every_n_steps=20, plugins=[AtomicCheckpoints()],
                        # our length buckets give each process its share under distributed training
                        # (data.shard); Lightning's own sampler would undo the bucketing
                        use_distributed_sampler=False)
    from tinyrnnt.model.training import chosen_precision

    precision = chosen_precision(cfg.train.precision, str(cfg.train.trainer.get("accelerator", "cpu")))
    if precision == "bf16":
        trainer_args["precision"] = "bf16-mixed"
    trainer_args.update(cfg.train.trainer)  # recipe's Trainer settings win (accelerator, devices, precision...)
    task.precision_used = str(cfg.train.trainer.get("precision", precision))
    _ADVERTS.quiet = quiet  # the accelerator lines are printed while the Trainer is built
    try:
        trainer = L.Trainer(**trainer_args)
    except TypeError as err:
        raise C.ConfigError(f"train.trainer: {err} (these settings go to lightning.Trainer unchanged)") from None
    finally:
        _ADVERTS.quiet = False

    # Checks passed: only now touch the run folder.
    new_folder = not run.exists()
    try:
        run.mkdir(parents=True, exist_ok=True)
    except OSError as err:
        raise C.ConfigError(f"run_dir {run}: cannot create the run folder ({err.strerror}); pick a writable place") from None
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
    remove_stale_temporaries(ckpt_dir)
    C.save(cfg, run / "config.yaml")
    C.save(cfg, ckpt_dir / "config.yaml")  # the final config beside every checkpoint
    try:
        with warnings.catch_warnings():
            warnings.filterwarnings("ignore", message=".*does not have many workers.*")
            warnings.filterwarnings("ignore", message=".*val_check_interval.*")
            warnings.filterwarnings("ignore", message=".*exists and is not empty.*")  # our config.yaml sits there
            warnings.filterwarnings("ignore", message=".*LeafSpec.*")  # Lightning-internal deprecation
            # ExactResume (lab/resume.py) continues a half-done epoch exactly; Lightning cannot see that
            warnings.filterwarnings("ignore", message=".*dataloader is not resumable.*")
            # short runs have fewer batches than the CSV logger's interval; the loss is logged anyway
            warnings.filterwarnings("ignore", message=".*log_every_n_steps.*")
            try:
                trainer.fit(task, train_dl, valid_dl, ckpt_path=resume_from)
            except SystemExit:
                # subtle: Lightning turns Ctrl-C into sys.exit(1); give the caller its KeyboardInterrupt back
                if trainer.interrupted:
                    raise KeyboardInterrupt from None
                raise
        # subtle: Lightning writes last.ckpt at validations; the budget usually ends between two, so the
        # final weights (the ones equal-step comparisons evaluate) are saved here.
        trainer.save_checkpoint(ckpt_dir / "last.ckpt", weights_only=False)  # with optimiser state, for --resume
    except BaseException:
        if new_folder and not any(ckpt_dir.glob("*.ckpt")):
            shutil.rmtree(run, ignore_errors=True)  # nothing worth keeping: leave no half-made run folder
        raise
    return TrainResult(run, Path(best.best_model_path or ckpt_dir / "last.ckpt"), ckpt_dir / "last.ckpt",
                       task.train_seconds, trainer.global_step, task.history(trainer.global_step),
                       clock.snapshots, clock)


def checkpoint_bytes(model: torch.nn.Module) -> int:
    """About the size of one checkpoint: float32 weights and Adam's two moments per parameter, and
    100 kB for the config, loop counters and resume point (measured: 50-60 kB)."""
    return 3 * 4 * sum(p.numel() for p in model.parameters()) + 100_000


def run_bytes(model: torch.nn.Module) -> int:
    """About the room a training run takes: three checkpoints (best, last, and a temporary one
    while saving) and 1 MB of logs and configs."""
    return 3 * checkpoint_bytes(model) + MB


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
