"""Output folders: an unwritable place or a disk without room is one clear sentence before any work,
and files appear whole or not at all. The references are the operating system's own refusals
(a read-only folder, a path under a regular file) and its free-space count (shutil.disk_usage)."""

import os
import shutil
import subprocess

import pytest
import torch

from tinyrnnt.cli import main
from tinyrnnt.files import OutputError, check_output_folder
from tinyrnnt.synth.corpus import CorpusConfig, build_corpus, expected_bytes, make_text

from test_cli import SMALL, TINY  # the same tiny corpus and model settings as the CLI tests


@pytest.fixture(scope="module")
def corpus(tmp_path_factory):
    folder = tmp_path_factory.mktemp("files") / "corpus"
    build_corpus(CorpusConfig(seed=6, **TINY), folder, quiet=True)
    return folder


@pytest.fixture
def unwritable(tmp_path):
    """A folder this process cannot write in: without write permission for a user other than root
    (root writes through permissions), a read-only tmpfs mount for root."""
    folder = tmp_path / "locked"
    folder.mkdir()
    if os.geteuid() != 0:
        folder.chmod(0o555)
        yield folder
        folder.chmod(0o755)
        return
    if subprocess.run(["mount", "-t", "tmpfs", "-o", "ro,size=1m", "tmpfs", str(folder)],
                      capture_output=True).returncode != 0:
        pytest.skip("running as root without the right to mount: no folder root cannot write in")
    yield folder
    subprocess.run(["umount", str(folder)], check=True)


def _fails(capsys, argv, *needles):
    code = main([str(a) for a in argv])
    err = capsys.readouterr().err
    assert code == 2 and err.startswith("error: ") and len(err.strip().splitlines()) == 1, err
    for needle in needles:
        assert needle in err, err


def test_the_folder_check_follows_the_operating_system(tmp_path, unwritable):
    check_output_folder(tmp_path / "not" / "yet" / "made", 0, "run_dir")  # made later, under a writable one
    assert not (tmp_path / "not").exists() and not list(tmp_path.glob(".write-check-*"))  # the probe is gone
    (tmp_path / "notes.txt").write_text("a file")
    with pytest.raises(OutputError, match="notes.txt is a file, not a folder"):
        check_output_folder(tmp_path / "notes.txt" / "run", 0, "run_dir")
    with pytest.raises(OutputError, match="cannot write in .*locked"):
        check_output_folder(unwritable / "run", 0, "run_dir")
    free = shutil.disk_usage(tmp_path).free
    with pytest.raises(OutputError, match=r"needs about \d+ MB, its disk has \d+ MB free"):
        check_output_folder(tmp_path, free + 10 ** 9, "run_dir")


def test_train_corpus_experiment_and_decode_refuse_an_unwritable_folder_before_work(corpus, unwritable, capsys):
    ckpt_run = unwritable.parent / "ok"
    assert main(["train", "--quiet", f"data.corpus={corpus}", f"run_dir={ckpt_run}", *SMALL]) == 0
    capsys.readouterr()
    _fails(capsys, ["train", f"data.corpus={corpus}", f"run_dir={unwritable / 'run'}", *SMALL], "run_dir", "cannot write")
    _fails(capsys, ["corpus", "--out", unwritable / "corpus", "--preset", "small"], "corpus folder", "cannot write")
    _fails(capsys, ["experiment", f"data.corpus={corpus}", f"out_dir={unwritable}", *SMALL], "results folder")
    _fails(capsys, ["decode", ckpt_run / "checkpoints" / "last.ckpt", "--corpus", corpus, "--out", unwritable / "d"],
           "decode output folder", "cannot write")
    # keyword spotting asked of a model with no trie boost to steer: one line, no hypotheses written
    out = unwritable.parent / "spot"
    _fails(capsys, ["decode", ckpt_run / "checkpoints" / "last.ckpt", "--corpus", corpus, "--split", "test_unseen",
                    "--list-size", "10", "--out", out, "decode.spotting=true"], "decode.spotting", "mix_heard")
    assert not out.exists() or not list(out.iterdir())


def test_a_disk_without_room_is_refused_before_training_or_building(corpus, tmp_path, capsys, monkeypatch):
    import tinyrnnt.files

    real = shutil.disk_usage
    monkeypatch.setattr(tinyrnnt.files.shutil, "disk_usage", lambda p: real(p)._replace(free=500_000))  # 0.5 MB left
    _fails(capsys, ["train", f"data.corpus={corpus}", f"run_dir={tmp_path / 'run'}", *SMALL], "run_dir", "0.5 MB free")
    _fails(capsys, ["corpus", "--out", tmp_path / "corpus", "--preset", "small"], "corpus folder", "0.5 MB free")
    assert sorted(p.name for p in tmp_path.iterdir()) == []  # nothing made


def test_the_room_asked_for_is_what_the_work_takes(corpus, tmp_path):
    from tinyrnnt import config as C
    from tinyrnnt.experiment import load_experiment
    from tinyrnnt.lab.train import checkpoint_bytes, load_model, train

    import yaml

    cfg = C.from_dict(CorpusConfig, yaml.safe_load((corpus / "config.yaml").read_text()))
    size = sum(p.stat().st_size for p in corpus.iterdir())
    assert 0.95 < expected_bytes(cfg, make_text(cfg)[2]) / size < 1.05  # the corpus folder as built
    run = train(load_experiment(None, [f"data.corpus={corpus}", f"run_dir={tmp_path / 'run'}", *SMALL]), quiet=True)
    model = load_model(run.last_checkpoint)[0]
    assert 0.9 < run.last_checkpoint.stat().st_size / checkpoint_bytes(model) <= 1.0


def test_a_checkpoint_that_cannot_be_saved_leaves_the_old_one_whole(tmp_path):
    from tinyrnnt.lab.resume import AtomicCheckpoints

    path = tmp_path / "last.ckpt"
    io = AtomicCheckpoints()
    io.save_checkpoint({"step": 1}, path)
    with pytest.raises(Exception):
        io.save_checkpoint({"step": 2, "not saveable": lambda: 0}, path)  # pickling fails mid-save
    assert torch.load(path, weights_only=True) == {"step": 1} and sorted(p.name for p in tmp_path.iterdir()) == ["last.ckpt"]
