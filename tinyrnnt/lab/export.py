"""A trained model as plain weights and settings, and the loader that rebuilds it.

The exported file is one `torch.save` of a dict holding only strings, numbers,
lists, dicts and tensors: `format`, `version`, `config` (the experiment
settings as a plain dict), `weights` (the transducer's state dict, biasing
input included) and `history` (the training behind it). It loads with
`torch.load(path, weights_only=True)`, which unpickles no objects, so a file
from elsewhere runs no code when read. No optimiser state, no Lightning
objects: for training on, keep the checkpoint.
"""

from __future__ import annotations

from pathlib import Path

import torch

from tinyrnnt.experiment import ExperimentConfig, experiment_from_dict
from tinyrnnt.model.transducer import Transducer

FORMAT = "tinyrnnt model weights"
VERSION = 1


def export_weights(model: Transducer, config: dict, out: str | Path, history: dict | None = None) -> Path:
    """Write `model` and its experiment settings (a plain dict) to `out` (temporary file, then rename)."""
    out = Path(out)
    weights = {}
    for k, v in model.state_dict().items():
        if not isinstance(v, torch.Tensor):
            raise TypeError(f"state entry {k!r} is a {type(v).__name__}, not a tensor; it cannot be exported")
        weights[k] = v.detach().cpu().clone()
    payload = {"format": FORMAT, "version": VERSION, "config": config, "weights": weights,
               "history": history or {}}
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.with_name(f".{out.name}.tmp")
    torch.save(payload, tmp)
    tmp.replace(out)
    return out


def export_checkpoint(checkpoint: str | Path, out: str | Path) -> Path:
    """A training checkpoint's model as an exported file."""
    from tinyrnnt.lab.train import load_model, read_checkpoint, read_history

    model, _, _ = load_model(checkpoint)
    _, config = read_checkpoint(checkpoint)
    return export_weights(model, config, out, read_history(checkpoint))


def load_exported(path: str | Path) -> tuple[Transducer, ExperimentConfig]:
    """Rebuild the transducer of an exported file (in eval mode) and its settings."""
    from tinyrnnt.lab.train import CheckpointError

    path = Path(path)
    if not path.is_file():
        raise CheckpointError(f"{path}: exported model not found")
    try:
        obj = torch.load(path, map_location="cpu", weights_only=True)
    except Exception as err:  # noqa: BLE001 - any unpickling failure means not our plain file
        raise CheckpointError(f"{path}: not a plain-weights file ({type(err).__name__}: {str(err)[:120]})") from None
    if not isinstance(obj, dict) or obj.get("format") != FORMAT:
        raise CheckpointError(f"{path}: not an exported tinyrnnt model (format {FORMAT!r} expected)")
    if obj.get("version") != VERSION:
        raise CheckpointError(f"{path}: export version {obj.get('version')!r}, this program reads {VERSION}")
    cfg = experiment_from_dict(obj["config"])
    model = Transducer(cfg.model, cfg.bias if cfg.bias.kind != "none" else None)
    try:
        model.load_state_dict(obj["weights"])
    except RuntimeError as err:
        raise CheckpointError(f"{path}: weights do not fit the model its settings describe ({str(err)[:200]})") from None
    model.eval()
    return model, cfg
