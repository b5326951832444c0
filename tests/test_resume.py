"""Resuming exactly: a training process killed with SIGKILL and resumed ends with the weights of an
uninterrupted run, tensor for tensor (the reference is that uninterrupted run, compared with
torch.equal); and the pieces that make it so (data order, training lists) in isolation."""

import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import torch

from tinyrnnt.data import LengthBuckets
from tinyrnnt.synth.corpus import CorpusConfig, build_corpus
from tinyrnnt.synth.sentences import TextConfig

# 160 training utterances in batches of 16: 10 batches an epoch, so 22 steps cross two epoch ends.
TINY = dict(train_utts=160, valid_utts=16, test_utts=16, test_unseen_utts=16, test_soundalike_utts=8, max_list_size=200,
            list_sizes=(0, 10), train_speakers=4, heldout_speakers=2, workers=1,
            text=TextConfig(n_invented_names=500, n_compounds=150, few_shot_share=0.004,
                            extra_styles={"fell": 40, "reed": 30}))
STEPS = 22
# Model dropout draws from the global torch generator, cue dropout from the trie's own one, the
# training lists and respellings from numpy: all three must continue where they stood.
SETTINGS = ["data.batch_size=16", "data.valid_subset=16", "model.encoder_dim=32", "model.predictor_dim=32",
            "model.predictor_embed=16", "model.joiner_dim=24", "model.encoder_layers=2", "train.minutes=0",
            "train.threads=1", "train.validate_every_steps=4", "train.snapshot_minutes=0", f"train.steps={STEPS}",
            "bias.kind=trie", "bias.cue_dim=8", "bias.cue_dropout=0.3", "bias.sampling.respell_few_shot=0.5",
            "model.dropout=0.2"]


def _step_of(path: Path) -> int | None:
    try:
        return int(torch.load(path, map_location="cpu", weights_only=True)["global_step"])
    except (FileNotFoundError, EOFError, RuntimeError):
        return None


def test_a_run_killed_mid_training_and_resumed_ends_with_the_weights_of_an_uninterrupted_run(tmp_path):
    from tinyrnnt.experiment import load_experiment
    from tinyrnnt.lab.train import train

    corpus = tmp_path / "corpus"
    build_corpus(CorpusConfig(seed=3, **TINY), corpus, quiet=True)
    args = [f"data.corpus={corpus}", *SETTINGS]
    command = [sys.executable, "-m", "tinyrnnt", "train", "--quiet"]
    killed = subprocess.Popen([*command, f"run_dir={tmp_path / 'killed'}", *args],
                              stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    try:
        straight = train(load_experiment(None, [f"run_dir={tmp_path / 'straight'}", *args]), quiet=True)
        last = tmp_path / "killed" / "checkpoints" / "last.ckpt"
        deadline = time.time() + 120
        while killed.poll() is None and time.time() < deadline and (_step_of(last) or 0) < 8:
            time.sleep(0.01)
        killed.send_signal(signal.SIGKILL)
    finally:
        killed.kill()
        killed.wait()
    assert killed.returncode == -signal.SIGKILL
    resumed_from = _step_of(last)
    assert resumed_from is not None and 8 <= resumed_from < STEPS  # it died with work left to do
    subprocess.run([*command, "--resume", f"run_dir={tmp_path / 'killed'}", *args], check=True,
                   stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    a = torch.load(straight.last_checkpoint, map_location="cpu", weights_only=True)
    b = torch.load(last, map_location="cpu", weights_only=True)
    assert a["global_step"] == b["global_step"] == STEPS
    assert a["state_dict"].keys() == b["state_dict"].keys()
    assert [k for k in a["state_dict"] if not torch.equal(a["state_dict"][k], b["state_dict"][k])] == []
    assert not list(last.parent.glob(".*.tmp"))  # no temporary checkpoint left behind


def test_batch_order_depends_only_on_seed_and_epoch_and_a_resumed_epoch_skips_what_was_done():
    lengths = np.random.default_rng(0).integers(10, 200, size=53)
    fresh = LengthBuckets(lengths, 8, 2, shuffle=True, seed=4)
    epochs = [list(fresh) for _ in range(3)]  # without a trainer, each iteration is the next epoch
    assert epochs[0] != epochs[1]
    for e in range(3):
        assert sorted(i for b in epochs[e] for i in b) == list(range(53))  # every utterance once an epoch
        assert epochs[e] == LengthBuckets(lengths, 8, 2, shuffle=True, seed=4).batches(e)
    resumed = LengthBuckets(lengths, 8, 2, shuffle=True, seed=4)
    resumed.start_at(1, 3)
    assert list(resumed) == epochs[1][3:] and list(resumed) == epochs[2]
    resumed.set_epoch(1)
    assert list(resumed) == epochs[1]


def test_a_training_list_depends_only_on_seed_epoch_and_utterance():
    from tinyrnnt.bias.base import ListSampling
    from tinyrnnt.bias.sampler import TrainingLists

    inventory = [{"word": f"w{i}", "group": str(i), "exposure": "distractor"} for i in range(40)]
    lists = TrainingLists(inventory, ListSampling(empty_list=0.0, size=(3, 6)), seed=2)

    def item(index, epoch):
        return {"index": index, "epoch": epoch, "spans": [], "text": "a", "tokens": [2]}

    forward = [lists(item(i, e))["list"] for e in range(2) for i in range(5)]
    backward = [lists(item(i, e))["list"] for e in reversed(range(2)) for i in reversed(range(5))][::-1]
    assert forward == backward  # the order of drawing changes nothing
    assert forward[:5] != forward[5:]  # another epoch, other lists
    other_seed = TrainingLists(inventory, ListSampling(empty_list=0.0, size=(3, 6)), seed=3)
    assert [other_seed(item(i, 0))["list"] for i in range(5)] != forward[:5]
