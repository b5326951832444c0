"""Distributed training: the length buckets' shares, and 2 CPU processes agreeing on their weights."""

import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from tinyrnnt.data import LengthBuckets, shard
from tinyrnnt.lab.ddpcheck import compare
from tinyrnnt.synth.corpus import CorpusConfig, build_corpus

from tests.test_pipeline import TINY

ROOT = Path(__file__).resolve().parents[1]


@pytest.mark.parametrize("world", [1, 2, 3, 4])
def test_each_process_takes_its_share_of_the_same_batches(world):
    buckets = LengthBuckets(np.random.default_rng(0).integers(50, 400, 103), 8, 3, shuffle=True, seed=4)
    batches = buckets.batches(2)
    shares = [shard(batches, r, world) for r in range(world)]
    assert len({len(s) for s in shares}) == 1  # the same number of steps on every process
    flat = [tuple(b) for s in shares for b in s]
    assert set(flat) == {tuple(b) for b in batches}  # every batch trained on
    assert len(flat) - len(batches) < world  # at most world - 1 repeats to even the last round


def test_two_cpu_processes_end_with_the_same_weights(tmp_path):
    build_corpus(CorpusConfig(seed=5, **TINY), tmp_path / "corpus", quiet=True)
    env = {**os.environ, "PYTHONPATH": str(ROOT), "OMP_NUM_THREADS": "1"}
    done = subprocess.run([sys.executable, "-m", "tinyrnnt.lab.ddpcheck", "--corpus", str(tmp_path / "corpus"),
                           "--out", str(tmp_path / "ddp"), "--steps", "4"], cwd=ROOT, env=env,
                          capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr[-3000:]
    result = compare(tmp_path / "ddp")
    assert result["ranks_agree"], result
    assert result["disjoint_utterances"] and result["utterances_per_rank"][0] == result["utterances_per_rank"][1]
