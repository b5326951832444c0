"""Before anything trains: the corpus is there (built when missing at the default path), the
evaluation plan fits it, and the results folder has room. Helpers of tinyrnnt.lab.recipes."""

from __future__ import annotations

import sys
from pathlib import Path
from typing import TYPE_CHECKING

from tinyrnnt import config as C
from tinyrnnt.experiment import ExperimentConfig

if TYPE_CHECKING:
    from tinyrnnt.lab.recipes import Arm, EvalPlan, Recipe


def ensure_corpus(cfg: ExperimentConfig, quiet: bool = False, build: bool = False) -> None:
    """Build the corpus when it is missing, but only at the default path or when `build` is asked:
    a mistyped `data.corpus` is an error, not a new corpus built where nobody looks."""
    from tinyrnnt.data import CorpusError, DataConfig
    from tinyrnnt.synth.card import format_card
    from tinyrnnt.synth.corpus import build_corpus

    from tinyrnnt.audio.corpus import is_manifest_folder, refresh_cache

    if is_manifest_folder(cfg.data.corpus):  # audio manifests: their corpus folder is cached inside
        refresh_cache(cfg.data.corpus, quiet=quiet)
        return
    if not (Path(cfg.data.corpus) / "card.json").is_file():
        if not build and Path(cfg.data.corpus) != Path(DataConfig().corpus):
            raise CorpusError(f"{cfg.data.corpus}: no corpus here (no card.json); check data.corpus, or build "
                              f"one with `tinyrnnt corpus --out {cfg.data.corpus}`")
        card = build_corpus(cfg.corpus, cfg.data.corpus, quiet=quiet)
        if not quiet:
            print(format_card(card), file=sys.stderr)


def check_plan(plan: EvalPlan, corpus: str) -> None:
    """Splits and list sizes of the evaluation plan exist in the corpus: checked before training."""
    import json

    from tinyrnnt.data import corpus_folder

    card = json.loads((corpus_folder(corpus) / "card.json").read_text(encoding="utf-8"))
    splits = sorted(card["splits"])
    missing = [s for s in plan.splits if s not in card["splits"]]
    if missing:
        raise C.ConfigError(f"evaluate.splits: {missing} not in corpus {corpus}; its splits: {splits}")
    largest = max((card["splits"][s].get("lists", {}).get("max", 0) for s in plan.splits), default=0)
    too_big = [n for n in plan.list_sizes if n < 0 or n > largest]
    if too_big:
        raise C.ConfigError(f"evaluate.list_sizes: {too_big} outside 0..{largest}, the list sizes corpus "
                            f"{corpus} offers")


def check_room(recipe: Recipe, arms: dict[str, Arm]) -> None:
    """Before anything trains: the results folder can be written and its disk holds every arm still
    to train (their checkpoints and logs) and the tables."""
    from tinyrnnt.files import MB, check_output_folder
    from tinyrnnt.lab.train import run_bytes
    from tinyrnnt.model.transducer import Transducer

    to_train = [a.cfg for a in arms.values() if not (Path(a.cfg.run_dir) / "checkpoints" / "last.ckpt").is_file()]
    need = sum(run_bytes(Transducer(c.model, c.bias if c.bias.kind != "none" else None)) for c in to_train)
    check_output_folder(Path(recipe.out_dir) / recipe.name, need + MB, "results folder")

