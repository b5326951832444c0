"""Typed settings: recipes, overrides, errors that list valid keys."""

import pytest

from tinyrnnt import config as C
from tinyrnnt.experiment import ExperimentConfig, load_experiment


def test_override_types_and_nesting():
    cfg = C.apply_overrides(ExperimentConfig(), ["model.encoder_dim=128", "train.minutes=0.5",
                                                 "train.trainer={accelerator: cpu}"])
    assert cfg.model.encoder_dim == 128 and cfg.train.minutes == 0.5
    assert cfg.train.trainer == {"accelerator": "cpu"}


def test_unknown_key_lists_valid_keys():
    with pytest.raises(C.ConfigError, match="valid keys: .*encoder_dim"):
        C.apply_overrides(ExperimentConfig(), ["model.encoder_size=3"])


def test_wrong_type_is_an_error():
    with pytest.raises(C.ConfigError, match="whole number"):
        C.apply_overrides(ExperimentConfig(), ["model.encoder_dim=big"])
    with pytest.raises(C.ConfigError, match="true or false"):
        C.apply_overrides(ExperimentConfig(), ["model.bidirectional=3"])


def test_recipe_lists_differences_and_round_trips(tmp_path):
    recipe = tmp_path / "r.yaml"
    recipe.write_text("# demo\nmodel:\n  joiner_dim: 96\n")
    cfg = load_experiment(recipe, ["train.seed=4"])
    assert cfg.model.joiner_dim == 96 and cfg.train.seed == 4
    assert cfg.model.encoder_dim == ExperimentConfig().model.encoder_dim  # untouched keys keep defaults
    C.save(cfg, tmp_path / "saved.yaml")
    again = load_experiment(tmp_path / "saved.yaml")
    assert again == cfg
    bad = tmp_path / "bad.yaml"
    bad.write_text("model:\n  colour: red\n")
    with pytest.raises(C.ConfigError, match="colour"):
        load_experiment(bad)
