"""Distributed data parallel, checked: a short training in 2 CPU processes (gloo), every process
writing the weights it ends with and the utterances it trained on.

    python -m tinyrnnt.lab.ddpcheck --corpus DIR --out DIR [--steps 4] [--processes 2]

Lightning starts the other processes by running this same command again (its
`ddp` strategy), so the check is a module with a command line, not a function.
`compare(out)` reads what the processes wrote: the largest weight difference
between them (0 when they agree) and whether their utterances were disjoint.
The Trainer settings are the ones a recipe would give: `train.trainer={strategy:
ddp, accelerator: cpu, devices: 2}`; nothing else changes.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

import torch


def _recorder(out: Path):
    import lightning as L

    class Record(L.Callback):
        """Per process: the ids of every training batch, then the final weights."""

        def __init__(self):
            self.ids: list[str] = []

        def on_train_batch_start(self, trainer, task, batch, batch_idx):
            self.ids += list(batch["ids"])

        def on_train_end(self, trainer, task):
            rank = trainer.global_rank
            torch.save({k: v.detach().clone() for k, v in task.model.state_dict().items()}, out / f"rank{rank}.pt")
            (out / f"rank{rank}.ids.json").write_text(json.dumps(self.ids))

    return Record()


def run(corpus: str, out: str | Path, steps: int = 4, processes: int = 2, settings=()) -> None:
    from tinyrnnt.experiment import load_experiment
    from tinyrnnt.lab.train import train

    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    cfg = load_experiment(None, [f"data.corpus={corpus}", f"run_dir={out / 'run'}", "data.batch_size=8",
                                 "data.valid_subset=8", "model.encoder_dim=32", "model.predictor_dim=32",
                                 "model.predictor_embed=16", "model.joiner_dim=24", "model.encoder_layers=2",
                                 f"train.steps={steps}", "train.minutes=0", "train.threads=1",
                                 f"train.validate_every_steps={steps}", "train.snapshot_minutes=0",
                                 f"train.trainer={{strategy: ddp, accelerator: cpu, devices: {processes}}}",
                                 *settings])
    train(cfg, quiet=True, callbacks=[_recorder(out)])


def compare(out: str | Path, processes: int = 2) -> dict:
    """{"max_weight_difference", "ranks_agree", "disjoint_utterances", "batches_per_rank"}."""
    out = Path(out)
    weights = [torch.load(out / f"rank{r}.pt", weights_only=True) for r in range(processes)]
    ids = [json.loads((out / f"rank{r}.ids.json").read_text()) for r in range(processes)]
    diff = max(float((weights[0][k] - w[k]).abs().max()) for w in weights[1:] for k in weights[0])
    seen = [set(x) for x in ids]
    disjoint = all(not (seen[a] & seen[b]) for a in range(processes) for b in range(a + 1, processes))
    return {"max_weight_difference": diff, "ranks_agree": diff == 0.0, "disjoint_utterances": disjoint,
            "utterances_per_rank": [len(x) for x in ids]}


def main(argv=None) -> int:
    p = argparse.ArgumentParser(prog="python -m tinyrnnt.lab.ddpcheck", description=__doc__,
                                formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--corpus", required=True)
    p.add_argument("--out", required=True)
    p.add_argument("--steps", type=int, default=4)
    p.add_argument("--processes", type=int, default=2)
    args = p.parse_args(argv)
    run(args.corpus, args.out, args.steps, args.processes)
    return 0


if __name__ == "__main__":
    sys.exit(main())
