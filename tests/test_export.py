"""Plain-weights export: loads with weights_only=True, rebuilds a model with the same outputs."""

import pickle

import pytest
import torch

from tinyrnnt import config as C
from tinyrnnt.decode.greedy import greedy_decode
from tinyrnnt.experiment import load_experiment
from tinyrnnt.lab.export import export_weights, load_exported
from tinyrnnt.lab.train import CheckpointError
from tinyrnnt.model.transducer import Transducer

SMALL = ["model.encoder_dim=32", "model.predictor_dim=32", "model.predictor_embed=16", "model.joiner_dim=24",
         "model.encoder_layers=2"]


@pytest.mark.parametrize("bias", [[], ["bias.kind=trie", "bias.cue_dim=8", "bias.inject=both", "bias.token_boost=true"]])
def test_exported_weights_round_trip_to_the_same_outputs(tmp_path, bias):
    torch.manual_seed(0)
    cfg = load_experiment(None, SMALL + bias)
    model = Transducer(cfg.model, cfg.bias if cfg.bias.kind != "none" else None).eval()
    path = export_weights(model, C.to_dict(cfg), tmp_path / "model.pt", {"steps": 3})
    # weights_only: only plain containers, numbers, strings and tensors; no pickled objects
    raw = torch.load(path, weights_only=True)
    assert set(raw) == {"format", "version", "config", "weights", "history"} and raw["history"] == {"steps": 3}
    loaded, cfg2 = load_exported(path)
    assert C.to_dict(cfg2) == C.to_dict(cfg)
    feats, lens = torch.randn(2, 60, 80), torch.tensor([60, 41])
    targets = torch.randint(1, 29, (2, 5))
    lists = [["maren", "oske"], []] if bias else None
    with torch.no_grad():
        a, _ = model(feats, lens, targets, lists=lists)
        b, _ = loaded(feats, lens, targets, lists=lists)
    assert torch.equal(a, b)
    biaser = model.bias.decoder(lists) if bias else None
    biaser2 = loaded.bias.decoder(lists) if bias else None
    assert greedy_decode(model, feats, lens, biaser=biaser) == greedy_decode(loaded, feats, lens, biaser=biaser2)


def test_a_file_that_is_not_an_export_is_one_clear_error(tmp_path):
    (tmp_path / "x.pt").write_bytes(pickle.dumps(object()))
    with pytest.raises(CheckpointError, match="not a plain-weights file"):
        load_exported(tmp_path / "x.pt")
    torch.save({"format": "something else"}, tmp_path / "y.pt")
    with pytest.raises(CheckpointError, match="not an exported tinyrnnt model"):
        load_exported(tmp_path / "y.pt")
    with pytest.raises(CheckpointError, match="not found"):
        load_exported(tmp_path / "z.pt")
