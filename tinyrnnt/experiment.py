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
    batch_size: int = 64  # utterances decoded together
    search: str = "greedy"  # greedy | beam (tinyrnnt.decode.beam)
    beam: int = 4  # hypotheses kept per utterance in beam search
    # Shallow fusion (beam search only): bonus per token of a listed entry being spelled
    # (tinyrnnt.bias.fusion); 0 = none. "anywhere" in the utterance, or only "after_trigger"
    # phrases of the entry's class: triggers = {class: "phrase | phrase"}.
    boost_weight: float = 0.0
    boost_where: str = "anywhere"
    triggers: dict = field(default_factory=dict)
    # With shallow fusion on: the weight of the biased model's own token boost (the trie's mixing
    # boost) while decoding, 1 = as trained; 0 leaves the boosting to fusion while the cue still
    # feeds joiner and predictor. Both push list words, so together they can over-boost.
    model_boost_scale: float = 1.0
    # Sounds-like spellings (tinyrnnt.bias.soundslike): each list entry whose pronunciation is known
    # is also listed in up to this many spellings the recognizer itself writes for its sound, and a
    # word decoded in one of them is written as the entry; 0 = lists as given.
    sounds_like: int = 0
    # Keyword spotting with the model's CTC head steers the trie's mixing boost towards the listed
    # entries that sound like the audio (tinyrnnt.bias.spotting); greedy and beam. Arms whose model
    # has no heard mixing boost (bias.boost_mode: mix_heard) decode without it.
    spotting: bool = False

    def __post_init__(self):
        from tinyrnnt.bias.fusion import BOOST_WHERE, check_weight, parse_triggers

        C.require(self, "decode", positive=("max_symbols", "batch_size", "beam"), at_least_zero=("sounds_like",))
        if self.search not in SEARCHES:
            raise C.ConfigError(f"decode.search must be one of {list(SEARCHES)}, got {self.search!r}")
        if self.boost_where not in BOOST_WHERE:
            raise C.ConfigError(f"decode.boost_where must be one of {list(BOOST_WHERE)}, got {self.boost_where!r}")
        self.boost_weight = check_weight(self.boost_weight)
        self.model_boost_scale = check_weight(self.model_boost_scale, "decode.model_boost_scale")
        if self.model_boost_scale < 0:
            raise C.ConfigError(f"decode.model_boost_scale must be >= 0, got {self.model_boost_scale:g}")
        if self.model_boost_scale != 1.0 and self.boost_weight == 0:
            raise C.ConfigError("decode.model_boost_scale balances the model's boost against shallow fusion: "
                                "it needs decode.boost_weight (not 0)")
        if self.boost_weight != 0 and self.search != "beam":
            raise C.ConfigError("decode.boost_weight needs decode.search=beam (shallow fusion scores beam hypotheses)")
        parse_triggers(self.triggers)  # checks phrases now, not mid-decoding

    def boost(self) -> dict | None:
        """The beam search's boost argument (None with weight 0: no booster at all)."""
        from tinyrnnt.bias.fusion import parse_triggers

        if self.boost_weight == 0:
            return None
        if self.boost_where == "after_trigger" and not self.triggers:  # checked here: settings come one by one
            raise C.ConfigError("decode.boost_where=after_trigger needs decode.triggers, e.g. "
                                "{invented_name: 'call | message'}")
        return {"weight": self.boost_weight, "where": self.boost_where, "triggers": parse_triggers(self.triggers),
                "model_scale": self.model_boost_scale}


SEARCHES = ("greedy", "beam")


# Settings that older checkpoints carry but nothing reads any more: dropped when read back.
RETIRED = {"decode": ("split",)}


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
    d = {k: ({kk: vv for kk, vv in v.items() if kk not in RETIRED[k]} if k in RETIRED and isinstance(v, dict) else v)
         for k, v in d.items()}
    return C.from_dict(ExperimentConfig, d, "config")


def with_defaults(d: dict) -> dict:
    """A saved config as today's code reads it: settings added since it was saved take their
    defaults, so a run saved before a new setting existed compares equal to one saved after."""
    return C.to_dict(experiment_from_dict(d))


def load_experiment(recipe=None, overrides=()) -> ExperimentConfig:
    """Defaults <- one experiment's recipe (a built-in name or a YAML path) <- `section.key=value` overrides."""
    if recipe is not None:
        import yaml

        from tinyrnnt.resources import resolve_recipe

        recipe = resolve_recipe(recipe)
        try:
            data = yaml.safe_load(recipe.read_text(encoding="utf-8")) if recipe.is_file() else None
        except yaml.YAMLError:
            data = None  # C.load reports the YAML error with its line
        if isinstance(data, dict) and "runs" in data:
            raise C.ConfigError(f"{recipe}: a recipe of several runs ({', '.join(map(str, data['runs']))}); "
                                "run it with `tinyrnnt experiment`, or give `train` a one-experiment recipe")
    return C.load(ExperimentConfig, recipe, overrides)
