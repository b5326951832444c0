"""The command line on bad input: one clear sentence naming the file, line or field; exit code 2;
no traceback, and nothing written."""

import json
import os
import subprocess
import sys

import pytest

from tinyrnnt.cli import main
from tinyrnnt.synth.corpus import CorpusConfig, build_corpus
from tinyrnnt.synth.sentences import TextConfig

TINY = dict(train_utts=160, valid_utts=16, test_utts=16, test_unseen_utts=16, test_soundalike_utts=8,
            max_list_size=200, list_sizes=(0, 10), train_speakers=4, heldout_speakers=2, workers=1,
            text=TextConfig(n_invented_names=500, n_compounds=150, few_shot_share=0.004,
                            extra_styles={"fell": 40, "reed": 30}))
SMALL = ["model.encoder_dim=32", "model.predictor_dim=32", "model.predictor_embed=16", "model.joiner_dim=24",
         "model.encoder_layers=2", "train.steps=2", "train.minutes=0", "train.threads=1", "data.batch_size=16",
         "data.valid_subset=16"]


@pytest.fixture(scope="module")
def corpus(tmp_path_factory):
    folder = tmp_path_factory.mktemp("cli") / "corpus"
    build_corpus(CorpusConfig(seed=2, **TINY), folder, quiet=True)
    return folder


def _fails(capsys, argv, *needles):
    code = main(argv)
    err = capsys.readouterr().err
    assert code == 2, err
    assert err.startswith("error: ") and "Traceback" not in err
    assert len(err.strip().splitlines()) == 1, err  # one sentence, not a dump
    for needle in needles:
        assert needle in err, err
    return err



def children(pid):  # direct children, read from /proc (Linux)
    out = []
    for d in os.listdir("/proc"):
        try:
            if d.isdigit() and int(open(f"/proc/{d}/stat").read().rsplit(")", 1)[1].split()[1]) == pid:
                out.append(int(d))
        except (OSError, IndexError, ValueError):
            pass
    return out

def live(pids):
    """The processes of `pids` still running (not gone, not a zombie), read from /proc (Linux)."""
    out = []
    for pid in pids:
        try:
            if open(f"/proc/{pid}/stat").read().rsplit(")", 1)[1].split()[0] != "Z":
                out.append(pid)
        except OSError:
            pass
    return out


def stop_with_sigterm(proc, workers, timeout=120):
    """SIGTERM to the command alone: it exits 143 with one `interrupted` line, and within 30 s none
    of its `workers` (which never see that signal) is left running."""
    import signal
    import time

    proc.send_signal(signal.SIGTERM)
    _, err = proc.communicate(timeout=timeout)
    assert proc.returncode == 143, err
    assert "Traceback" not in err and err.strip().splitlines()[-1].startswith("interrupted")
    deadline = time.monotonic() + 30
    while live(workers) and time.monotonic() < deadline:
        time.sleep(0.2)
    assert not live(workers)


def test_bad_settings_are_named_before_anything_is_written(corpus, tmp_path, capsys):
    run = tmp_path / "run"
    base = ["train", f"data.corpus={corpus}", f"run_dir={run}", *SMALL]
    _fails(capsys, base + ["model.encoder_dim=-3"], "model.encoder_dim")
    _fails(capsys, base + ["bias.kind=magic"], "bias.kind", "trie")
    _fails(capsys, base + ["bias.kind=trie", "bias.inject=nowhere"], "bias.inject", "joiner")
    _fails(capsys, base + ["train.loss_implementation=fast"], "train.loss_implementation")
    _fails(capsys, base + ["train.trainer={no_such_setting: 1}"], "train.trainer")
    _fails(capsys, base + ["train.trainer={accelerator: gpu"], "not valid YAML", "quote")
    _fails(capsys, base + ["model.colour=red"], "unknown key", "valid keys")
    _fails(capsys, base + ["steps"], "section.key=value")
    assert not run.exists()


def test_recipes_corpora_and_files_that_do_not_fit(corpus, tmp_path, capsys):
    bad_yaml = tmp_path / "bad.yaml"
    bad_yaml.write_text("runs: {baseline: {}\n")
    _fails(capsys, ["experiment", "--recipe", str(bad_yaml)], "bad.yaml", "not valid YAML")
    _fails(capsys, ["train", "--recipe", "trie_vs_baseline"], "several runs", "tinyrnnt experiment")
    _fails(capsys, ["experiment", "--recipe", "nonesuch"], "unknown recipe", "trie_vs_baseline")
    _fails(capsys, ["experiment", f"data.corpus={corpus}", "evaluate.list_sizes=[0, 99999]"], "list_sizes", "99999")
    _fails(capsys, ["train", f"data.corpus={tmp_path / 'corpsu'}", *SMALL], "no corpus here")
    assert not (tmp_path / "corpsu").exists()
    _fails(capsys, ["card", str(tmp_path)], "card.json")
    _fails(capsys, ["corpus", "--out", str(tmp_path / "c"), "--preset", "huge"], "preset", "small")
    _fails(capsys, ["corpus", "--out", str(tmp_path / "c"), "text.few_shot_share=2"], "text.few_shot_share")
    assert not (tmp_path / "c").exists()


def test_scoring_files_that_do_not_fit(corpus, tmp_path, capsys):
    _fails(capsys, ["score", str(tmp_path / "missing.jsonl")], "not found")
    empty = tmp_path / "empty.jsonl"
    empty.write_text("\n\n")
    _fails(capsys, ["score", str(empty)], "no hypotheses")
    broken = tmp_path / "broken.jsonl"
    broken.write_text(json.dumps({"ref": "a b", "hyp": "a b"}) + "\n\n{not json\n")
    _fails(capsys, ["score", str(broken)], "broken.jsonl:3")
    other = tmp_path / "other.jsonl"
    other.write_text(json.dumps({"id": "valid-000003", "ref": "a", "hyp": "a", "list_size": 10}) + "\n")
    _fails(capsys, ["score", str(other), "--corpus", str(corpus), "--split", "test"], "another split")
    ok = tmp_path / "ok.jsonl"
    ok.write_text(json.dumps({"ref": "Call  Maren", "hyp": "call maren"}) + "\n\n")  # case, spaces, blank line
    assert main(["score", str(ok)]) == 0
    assert json.loads(capsys.readouterr().out)["wer"] == 0.0


def test_version_module_entry_and_bench_help():
    out = subprocess.run([sys.executable, "-m", "tinyrnnt", "--version"], capture_output=True, text=True)
    assert out.returncode == 0 and out.stdout.startswith("tinyrnnt ")
    out = subprocess.run([sys.executable, "-m", "tinyrnnt", "bench", "--help"], capture_output=True, text=True)
    assert out.returncode == 0 and "corpus" in out.stdout and "trie" in out.stdout


def test_a_regular_install_finds_the_builtin_scenario_and_recipes(tmp_path):
    """Build a wheel, unpack it away from the checkout, and read the built-in recipe and scenario."""
    from pathlib import Path

    root = Path(__file__).resolve().parents[1]
    built = subprocess.run([sys.executable, "-m", "pip", "wheel", str(root), "-w", str(tmp_path / "wheel"),
                            "--no-deps", "--no-build-isolation", "-q"], capture_output=True, text=True)
    if built.returncode != 0:
        pytest.skip(f"could not build a wheel here: {built.stderr.strip()[-200:]}")
    wheel = next((tmp_path / "wheel").glob("tinyrnnt-*.whl"))
    site = tmp_path / "site"
    subprocess.run([sys.executable, "-m", "pip", "install", "--no-deps", "-q", "--target", str(site), str(wheel)],
                   check=True, capture_output=True)
    probe = ("import tinyrnnt, sys; from tinyrnnt.lab.recipes import read_recipe; "
             "from tinyrnnt.synth.scenario import load_scenario; "
             "assert str(tinyrnnt.__file__).startswith(sys.argv[1]), tinyrnnt.__file__; "
             "print(sorted(read_recipe(None).runs), load_scenario('ferry_network').name)")
    out = subprocess.run([sys.executable, "-c", probe, str(site)], cwd=tmp_path, capture_output=True, text=True,
                         env={"PYTHONPATH": str(site), "PATH": "/usr/bin:/bin"})
    assert out.returncode == 0, out.stderr
    assert out.stdout.split() == ["['baseline',", "'trie']", "ferry_network"]


def test_ctrl_c_exits_130_and_experiment_resume_keeps_what_was_finished(corpus, tmp_path):
    """An experiment interrupted (SIGINT) during its second run exits 130 with one line; run again with
    --resume, it keeps the finished first run (its checkpoint untouched) and completes."""
    import signal
    import time

    recipe = tmp_path / "r.yaml"
    recipe.write_text(f"""
name: interrupted
out_dir: {tmp_path / 'runs'}
controls: false
shared:
  data: {{corpus: {corpus}, batch_size: 16, valid_subset: 16}}
  model: {{encoder_dim: 32, predictor_dim: 32, predictor_embed: 16, joiner_dim: 24, encoder_layers: 2}}
  train: {{steps: 4, minutes: 0, validate_every_steps: 2, threads: 1, snapshot_minutes: 0}}
runs:
  first: {{}}
  second: {{train: {{steps: 100000, minutes: 3}}}}  # far longer than the wait for its first checkpoint
evaluate: {{splits: [test], list_sizes: [0]}}
""")
    folder = tmp_path / "runs" / "interrupted"
    cmd = [sys.executable, "-m", "tinyrnnt", "experiment", "--quiet", "--recipe", str(recipe)]
    # subtle: a shell starts background jobs with SIGINT ignored, and children inherit that; the
    # command is given the default disposition so the test holds however the suite was started.
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            preexec_fn=lambda: signal.signal(signal.SIGINT, signal.SIG_DFL))
    deadline = time.time() + 120
    while not (folder / "second" / "checkpoints" / "last.ckpt").is_file() and time.time() < deadline:
        time.sleep(0.05)
    proc.send_signal(signal.SIGINT)
    _, err = proc.communicate(timeout=120)
    assert proc.returncode == 130, err
    assert "Traceback" not in err and err.strip().splitlines()[-1].startswith("interrupted")
    first = folder / "first" / "checkpoints" / "last.ckpt"
    stamp = first.stat().st_mtime_ns
    done = subprocess.run(cmd + ["--resume", "train.steps=4"], capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr
    assert first.stat().st_mtime_ns == stamp  # the finished run was kept, not trained again
    assert (folder / "results.md").is_file()


def test_sigterm_stops_parallel_training_workers_too(corpus, tmp_path):
    """SIGTERM sent to the command alone (as a job scheduler does) exits 143 with one line, and the
    training workers of a parallel recipe, which never see that signal, are stopped, not orphaned."""
    import time

    recipe = tmp_path / "r.yaml"
    recipe.write_text(f"""
name: terminated
out_dir: {tmp_path / 'runs'}
controls: false
parallel: 2
shared:
  data: {{corpus: {corpus}, batch_size: 16, valid_subset: 16}}
  model: {{encoder_dim: 32, predictor_dim: 32, predictor_embed: 16, joiner_dim: 24, encoder_layers: 2}}
  train: {{steps: 100000, minutes: 3, validate_every_steps: 2, threads: 1, snapshot_minutes: 0}}
runs:
  one: {{}}
  two: {{train: {{seed: 1}}}}
evaluate: {{splits: [test], list_sizes: [0]}}
""")
    folder = tmp_path / "runs" / "terminated"
    proc = subprocess.Popen([sys.executable, "-m", "tinyrnnt", "experiment", "--quiet", "--recipe", str(recipe)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    deadline = time.time() + 120
    while not list(folder.glob("*/checkpoints/last.ckpt")) and time.time() < deadline:
        time.sleep(0.05)

    workers = children(proc.pid)
    assert workers, "the recipe should be training in worker processes"
    stop_with_sigterm(proc, workers)


def test_sigterm_stops_a_benchmarks_training_workers(corpus, tmp_path):
    """`python -m tinyrnnt.bench trie` killed with SIGTERM mid-training exits 143 with one line and
    stops the recipe's training workers (which never see the signal) instead of orphaning them."""
    import signal
    import time

    proc = subprocess.Popen([sys.executable, "-m", "tinyrnnt.bench", "trie", "--corpus", str(corpus),
                             "--run-dir", str(tmp_path / "runs" / "trie"), "--minutes", "3"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    workers = []
    try:
        deadline = time.time() + 420  # the cue timing and the corpus come first; slow on a busy machine
        while not list((tmp_path / "runs").rglob("logs")) and time.time() < deadline:  # a worker trains
            time.sleep(0.1)
        workers = children(proc.pid)
        assert len(workers) >= 2, "the benchmark should be training in a worker process"
        stop_with_sigterm(proc, workers)
    finally:  # a failed check leaves nothing running
        proc.kill()
        for w in live(workers):
            os.kill(w, signal.SIGKILL)
