"""The experiment config: one dataclass per component, combined; loaded from recipe + overrides."""

from __future__ import annotations

from dataclasses import dataclass, field

from tinyrnnt import config as C
from tinyrnnt.bias.base import BiasConfig
from tinyrnnt.data import DataConfig
from tinyrnnt.model.training import TrainConfig
from tinyrnnt.model.transducer import ModelConfig
from tinyrnnt.synth.corpus import CorpusConfig


@dataclass
class DecodeConfig:
    max_symbols: int = 4  # tokens per encoder frame at most (guard against never emitting blank)
    split: str = "test"
    batch_size: int = 64


@dataclass
class ExperimentConfig:
    name: str = "baseline"
    run_dir: str = "runs/baseline"  # checkpoints, logs, config, results
    corpus: CorpusConfig = field(default_factory=CorpusConfig)  # used when the corpus must be built
    data: DataConfig = field(default_factory=DataConfig)
    model: ModelConfig = field(default_factory=ModelConfig)
    bias: BiasConfig = field(default_factory=BiasConfig)  # kind "none" = the plain baseline
    train: TrainConfig = field(default_factory=TrainConfig)
    decode: DecodeConfig = field(default_factory=DecodeConfig)


def experiment_from_dict(d: dict) -> ExperimentConfig:
    return C.from_dict(ExperimentConfig, d, "config")


def load_experiment(recipe=None, overrides=()) -> ExperimentConfig:
    return C.load(ExperimentConfig, recipe, overrides)
