"""What a checkpoint carries so that a resumed run ends with the weights of an uninterrupted one.

Lightning's checkpoint holds weights, optimiser, schedule and loop counters. For a deterministic
run to continue exactly it also needs where the data stood and the random streams training draws
from; `ExactResume` adds them under the checkpoint key "resume_point":

- the epoch and the batches of it already trained on: the length-bucket sampler's order depends
  only on (seed, epoch), so the resumed run skips those batches and goes on with the next one
  (training lists depend only on (seed, epoch, utterance), so prefetching cannot shift them);
- the global torch generator (dropout, feature masks) and every `torch.Generator` a model part
  keeps of its own (the trie cue's dropout).

Checked by `tests/test_resume.py` (a training process killed with SIGKILL, resumed, compared
tensor by tensor with an uninterrupted run) and by `bench faults`. Generators on a GPU are not
saved: exact resuming is for CPU runs.

`AtomicCheckpoints` makes every checkpoint file appear whole: it is written under a temporary
name beside its place and renamed (Lightning's own save goes through the system temporary
folder, which may lie on another disk, where the final move is a copy).
"""

from __future__ import annotations

import io
import os
from pathlib import Path

import lightning as L
import torch
from lightning.pytorch.plugins.io import TorchCheckpointIO

from tinyrnnt.data import LengthBuckets

KEY = "resume_point"


def own_generators(module: torch.nn.Module) -> dict[str, torch.Generator]:
    """Every torch.Generator kept as an attribute by a submodule, by "module.attribute" name."""
    found = {}
    for name, sub in module.named_modules():
        for attr, value in vars(sub).items():
            if isinstance(value, torch.Generator):
                found[f"{name}.{attr}" if name else attr] = value
    return found


class ExactResume(L.Callback):
    """Records the data position and random states in every checkpoint; restores them on resume."""

    def __init__(self, sampler: LengthBuckets):
        self.sampler = sampler
        self.epoch = self.batches = 0  # the epoch under way and its batches trained on

    def on_train_epoch_start(self, trainer, task):
        self.epoch, self.batches = trainer.current_epoch, 0
        # subtle: the trainer opens the first epoch's data before this hook and later epochs' after
        # it, and on resuming it may open the data once more than it uses; setting the epoch here,
        # rather than counting iterations, keeps the order tied to the epoch the trainer runs.
        self.sampler.set_epoch(trainer.current_epoch)

    def on_train_batch_end(self, trainer, task, outputs, batch, batch_idx):
        self.batches += 1

    def on_save_checkpoint(self, trainer, task, checkpoint):
        checkpoint[KEY] = {"epoch": self.epoch, "batches": self.batches, "torch_rng": torch.get_rng_state(),
                           "generators": {k: g.get_state() for k, g in own_generators(task).items()}}

    def on_load_checkpoint(self, trainer, task, checkpoint):
        point = checkpoint.get(KEY)
        if point is None:  # a checkpoint from before resume points: it resumes, but not exactly
            return
        self.epoch, self.batches = int(point["epoch"]), int(point["batches"])
        self.sampler.start_at(self.epoch, self.batches)
        torch.set_rng_state(point["torch_rng"])
        generators = own_generators(task)
        for name, state in point["generators"].items():
            if name in generators:
                generators[name].set_state(state)


class AtomicCheckpoints(TorchCheckpointIO):
    """Checkpoint files are written to a temporary name in their own folder, then renamed."""

    def save_checkpoint(self, checkpoint, path, storage_options=None):
        path = Path(path)
        path.parent.mkdir(parents=True, exist_ok=True)
        tmp = path.with_name(f".{path.name}.tmp")
        data = io.BytesIO()
        torch.save(checkpoint, data)  # serialised first, so a full disk is a plain OSError below
        try:
            with open(tmp, "wb") as f:
                f.write(data.getbuffer())
                f.flush()
                os.fsync(f.fileno())
            os.replace(tmp, path)
        except OSError as err:  # a full or read-only disk: say which checkpoint could not be written
            tmp.unlink(missing_ok=True)
            raise OSError(err.errno, err.strerror, str(path)) from None
        except BaseException:
            tmp.unlink(missing_ok=True)
            raise


def remove_stale_temporaries(ckpt_dir: Path) -> None:
    """A process killed while saving leaves its temporary checkpoint behind; the real one is intact."""
    for p in ckpt_dir.glob(".*.ckpt.tmp"):
        p.unlink(missing_ok=True)
