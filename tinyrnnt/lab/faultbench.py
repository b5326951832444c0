"""The `faults` benchmark: bad inputs, injected faults and large inputs, counted.

Every catalogue entry runs the real command (`python -m tinyrnnt ...`) in a
scratch folder and is judged from outside: a clear error is exit code 2 with
one `error:` line and no traceback. After each entry the folder is searched
for half-written files (temporary names, half-made run folders), and files a
user put there are checked to still be there unchanged. The catalogue also
holds output places that cannot take the work: one under a regular file, a
folder without write permission and a disk with 1 MB free (see `write_traps`).
Faults: a training process killed with SIGKILL at a random step and resumed,
and one whose disk fills up mid-run, resumed once there is room again, each
compared tensor by tensor with an uninterrupted run. Load: a 100,000-entry
list, and decoding time at two split sizes. Last, a wheel of the project is
installed away from the checkout and the main job runs from it on a tiny corpus.
"""

from __future__ import annotations

import contextlib
import json
import os
import random
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path

TINY = ["model.encoder_dim=32", "model.predictor_dim=32", "model.predictor_embed=16", "model.joiner_dim=24",
        "model.encoder_layers=2", "train.minutes=0", "train.threads=1", "data.batch_size=16",
        "data.valid_subset=16", "train.validate_every_steps=4", "train.snapshot_minutes=0"]


def _log(msg: str) -> None:
    print(msg, file=sys.stderr, flush=True)


def _cli(args, cwd: Path, env=None, timeout=600) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "tinyrnnt", *map(str, args)], cwd=cwd, capture_output=True,
                          text=True, timeout=timeout, env=env)


def _tiny_corpus(folder: Path, train_utts: int = 400) -> None:
    from tinyrnnt.synth.corpus import CorpusConfig, build_corpus
    from tinyrnnt.synth.sentences import TextConfig

    build_corpus(CorpusConfig(seed=4, train_utts=train_utts, valid_utts=16, test_utts=40, test_unseen_utts=40,
                              test_soundalike_utts=8, max_list_size=200, list_sizes=(0, 10), train_speakers=6,
                              heldout_speakers=2, workers=1,
                              text=TextConfig(n_invented_names=500, n_compounds=150, few_shot_share=0.004,
                                              extra_styles={"fell": 40, "reed": 30})), folder, quiet=True)


def _partial_files(root: Path) -> list[str]:
    bad = []
    for p in root.rglob("*"):
        if p.name.endswith(".tmp") or ".partial-" in p.name or ".old-" in p.name:
            bad.append(str(p))
        if p.is_dir() and (p / "config.yaml").is_file() and (p / "checkpoints").is_dir() \
                and not any((p / "checkpoints").glob("*.ckpt")) and p.name != "checkpoints":
            bad.append(f"{p} (run folder without a checkpoint)")
    return bad


@contextlib.contextmanager
def write_traps(root: Path):
    """{"unwritable": folder, "full": folder} where writing fails, made the way this user can: for a
    user other than root, a folder without write permission (root writes through permissions);
    for root, a read-only and a 1 MB tmpfs mount. A trap that cannot be made is left out."""
    traps, mounted = {}, []
    try:
        if os.geteuid() != 0:
            (root / "locked").mkdir()
            (root / "locked").chmod(0o555)
            traps["unwritable"] = root / "locked"
        else:
            for name, options in (("unwritable", "ro,size=1m"), ("full", "size=1m")):
                (root / name).mkdir()
                if subprocess.run(["mount", "-t", "tmpfs", "-o", options, "tmpfs", str(root / name)],
                                  capture_output=True).returncode == 0:
                    traps[name] = root / name
                    mounted.append(root / name)
        yield traps
    finally:
        for folder in mounted:
            subprocess.run(["umount", str(folder)], capture_output=True)
        if (root / "locked").exists():
            (root / "locked").chmod(0o755)


TRAP_NAMES = {"unwritable": "write_protected", "full": "full_disk"}  # catalogue names of the traps


def catalogue(root: Path, corpus: Path, ckpt: Path, traps: dict) -> list[tuple[str, list]]:
    """(name, command arguments) of every bad input tried; files they need are written here."""
    w = root / "inputs"
    w.mkdir()
    (w / "bad.yaml").write_text("runs: {baseline: {}\n")
    (w / "empty.jsonl").write_text("\n")
    (w / "broken.jsonl").write_text('{"ref": "a", "hyp": "a"}\n{not json\n')
    (w / "other.jsonl").write_text(json.dumps({"id": "valid-000001", "ref": "a", "hyp": "a", "list_size": 10}) + "\n")
    (w / "list.txt").write_text("maren\nkell7\n")
    (w / "sections.txt").write_text("[crew after: call\nmaren\n")
    (w / "half.ckpt").write_bytes(ckpt.read_bytes()[: ckpt.stat().st_size // 2])
    import torch

    torch.save({"state_dict": {}, "hyper_parameters": {"config": {}}, "payload": Path("x")}, w / "object.ckpt")
    user = root / "user_folder"
    for name, change in (("truncated_shard", lambda d: (d / "test.feats.npy").write_bytes(b"\x93NUMPY")),
                         ("corrupt_card", lambda d: (d / "card.json").write_text("{not json")),
                         ("empty_lists", lambda d: (d / "test.lists.npy").write_bytes(b"")),
                         ("bad_manifest", lambda d: (d / "test.jsonl").write_text('{"id": "x"}\n'))):
        target = w / name
        subprocess.run(["cp", "-r", str(corpus), str(target)], check=True)
        change(target)
    scn = w / "scenario.yaml"
    scn.write_text("name: x\nentity_slots: {crew: invented_name}\nphrases: {}\ncompound_parts: []\nrare_words: []\n")
    scn_lex = w / "scenario_lex.yaml"
    scn_lex.write_text(scn.read_text() + "filler: {count: 10, words: [1, 2], weight_power: 0.5}\n"
                       "lexicon_file: missing.txt\ntemplates: ['call {crew}']\n")
    run = ["train", f"data.corpus={corpus}", f"run_dir={root / 'runs' / 'bad'}", "train.steps=2", *TINY]
    return [
        ("corpus_overwrite_of_a_user_folder", ["corpus", "--out", user, "--overwrite", "--preset", "small"]),
        ("corpus_unknown_preset", ["corpus", "--out", root / "c1", "--preset", "huge"]),
        ("corpus_share_out_of_range", ["corpus", "--out", root / "c2", "text.few_shot_share=2"]),
        ("scenario_missing_keys", ["corpus", "--out", root / "c3", f"scenario={scn}"]),
        ("scenario_missing_lexicon_file", ["corpus", "--out", root / "c4", f"scenario={scn_lex}"]),
        ("mistyped_corpus_path", ["train", f"data.corpus={root / 'corpsu'}", "train.steps=2", *TINY]),
        ("negative_dimension", run + ["model.encoder_dim=-3"]),
        ("unknown_biasing_kind", run + ["bias.kind=magic"]),
        ("unknown_injection_point", run + ["bias.kind=trie", "bias.inject=nowhere"]),
        ("unknown_loss_implementation", run + ["train.loss_implementation=fast"]),
        ("unknown_trainer_key", run + ["train.trainer={no_such_setting: 1}"]),
        ("unquoted_yaml_override", run + ["train.trainer={accelerator: gpu"]),
        ("unknown_setting", run + ["model.colour=red"]),
        ("override_without_equals", run + ["steps"]),
        ("multi_run_recipe_to_train", ["train", "--recipe", "trie_vs_baseline"]),
        ("malformed_recipe", ["experiment", "--recipe", w / "bad.yaml"]),
        ("unknown_recipe", ["experiment", "--recipe", "nonesuch"]),
        ("list_size_beyond_corpus", ["experiment", f"data.corpus={corpus}", "evaluate.list_sizes=[0,99999]"]),
        ("init_from_other_model_size", run + [f"train.init_from={ckpt}", "model.encoder_dim=48"]),
        ("resume_with_other_settings", ["train", "--resume", f"run_dir={ckpt.parent.parent}", f"data.corpus={corpus}",
                                        "train.steps=8", *TINY, "model.joiner_dim=40"]),
        ("score_missing_file", ["score", w / "missing.jsonl"]),
        ("score_empty_file", ["score", w / "empty.jsonl"]),
        ("score_broken_line", ["score", w / "broken.jsonl"]),
        ("score_other_split", ["score", w / "other.jsonl", "--corpus", corpus, "--split", "test"]),
        ("card_of_a_plain_folder", ["card", w]),
        ("decode_missing_checkpoint", ["decode", w / "missing.ckpt", "--corpus", corpus]),
        ("decode_truncated_checkpoint", ["decode", w / "half.ckpt", "--corpus", corpus]),
        ("decode_object_checkpoint", ["decode", w / "object.ckpt", "--corpus", corpus]),
        ("decode_list_file_bad_character", ["decode", ckpt, "--corpus", corpus, "--list-file", w / "list.txt"]),
        ("decode_truncated_shard", ["decode", ckpt, "--corpus", w / "truncated_shard"]),
        ("decode_corrupt_card", ["decode", ckpt, "--corpus", w / "corrupt_card"]),
        ("decode_empty_list_file", ["decode", ckpt, "--corpus", w / "empty_lists", "--list-size", "10"]),
        ("decode_bad_manifest", ["decode", ckpt, "--corpus", w / "bad_manifest"]),
        ("boost_weight_not_finite", ["decode", ckpt, "--corpus", corpus, "decode.search=beam",
                                     "decode.boost_weight=.inf"]),
        ("boost_without_beam", ["decode", ckpt, "--corpus", corpus, "decode.boost_weight=2"]),
        ("trigger_phrase_empty", ["decode", ckpt, "--corpus", corpus, "decode.search=beam", "decode.boost_weight=2",
                                  "decode.boost_where=after_trigger", "decode.triggers={invented_name: 'call | '}"]),
        ("trigger_unknown_class", ["decode", ckpt, "--corpus", corpus, "--list-size", "10", "decode.search=beam",
                                   "decode.boost_weight=2", "decode.boost_where=after_trigger",
                                   "decode.triggers={crew: call}"]),
        ("list_file_bad_class_line", ["decode", ckpt, "--corpus", corpus, "--list-file", w / "sections.txt",
                                      "decode.search=beam", "decode.boost_weight=2"]),
        ("run_folder_under_a_file", ["train", f"data.corpus={corpus}", f"run_dir={w / 'list.txt' / 'run'}",
                                   "train.steps=2", *TINY]),
    ] + [(f"{TRAP_NAMES[trap]}_{what}", argv) for trap, folder in traps.items() for what, argv in (
        ("run_folder", ["train", f"data.corpus={corpus}", f"run_dir={folder / 'run'}", "train.steps=2", *TINY]),
        ("corpus_folder", ["corpus", "--out", folder / "corpus", "--preset", "small"]),
        ("results_folder", ["experiment", f"data.corpus={corpus}", f"out_dir={folder}", "train.steps=2", *TINY,
                            "evaluate.splits=[test]", "evaluate.list_sizes=[0]"]),
        # a decode's results fit in 1 MB: only a folder that takes no file at all refuses it
        *([("decode_folder", ["decode", ckpt, "--corpus", corpus, "--out", folder / "decoded"])]
          if trap == "unwritable" else []))]


FAULT_STEPS = 24


def _same_weights(a: Path, b: Path) -> bool:
    import torch

    from tinyrnnt.lab.train import load_model

    x, y = load_model(a)[0].state_dict(), load_model(b)[0].state_dict()
    return x.keys() == y.keys() and all(torch.equal(x[k], y[k]) for k in x)


def _step(ckpt: Path) -> int:
    import torch

    return int(torch.load(ckpt, map_location="cpu", weights_only=True)["global_step"])


def kill_and_resume(root: Path, corpus: Path, args: list, straight: Path, rng: random.Random) -> dict:
    """Train again, kill it with SIGKILL at a random moment after its first checkpoint, resume it:
    the weights of the uninterrupted run `straight`?"""
    proc = subprocess.Popen([sys.executable, "-m", "tinyrnnt", "train", "--quiet", f"run_dir={root / 'killed'}",
                             *args], cwd=root, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    last = root / "killed" / "checkpoints" / "last.ckpt"
    deadline = time.time() + 300
    while not last.is_file() and proc.poll() is None and time.time() < deadline:
        time.sleep(0.05)
    time.sleep(rng.uniform(0.0, 2.0))  # a random step after the first checkpoint
    proc.send_signal(signal.SIGKILL)
    proc.wait()
    resumed_from = _step(last)
    _cli(["train", "--quiet", "--resume", f"run_dir={root / 'killed'}", *args], root)
    identical = _same_weights(straight, last)
    return {"resumed_from_step": resumed_from, "identical": identical,
            "survived": identical and resumed_from < FAULT_STEPS}  # it died with steps left to do


def disk_fills_during_training(root: Path, args: list, straight: Path) -> dict | None:
    """Train on a small disk (tmpfs, root only), fill it after the first checkpoint; the run must
    stop with one clear error and whole checkpoints, then resume (once there is room) to the
    weights of the uninterrupted run `straight`. None where no such disk can be mounted."""
    disk = root / "small_disk"
    disk.mkdir()
    if os.geteuid() != 0 or subprocess.run(["mount", "-t", "tmpfs", "-o", "size=8m", "tmpfs", str(disk)],
                                           capture_output=True).returncode != 0:
        return None
    try:
        run = disk / "run"
        proc = subprocess.Popen([sys.executable, "-m", "tinyrnnt", "train", "--quiet", f"run_dir={run}", *args],
                                cwd=root, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
        last = run / "checkpoints" / "last.ckpt"
        while not last.is_file() and proc.poll() is None:
            time.sleep(0.05)
        with open(disk / "filler", "wb") as f:  # take every byte left
            with contextlib.suppress(OSError):
                while True:
                    f.write(b"\0" * 65536)
                    f.flush()
        err = proc.communicate()[1]
        lines = [ln for ln in err.strip().splitlines() if ln.strip()]
        clear = proc.returncode == 2 and bool(lines) and lines[-1].startswith("error: ") and "Traceback" not in err
        stopped_at = _step(last)
        temporaries = [p.name for p in run.rglob("*.tmp")]
        (disk / "filler").unlink()
        _cli(["train", "--quiet", "--resume", f"run_dir={run}", *args], root)
        identical = _same_weights(straight, last)
        return {"stopped_at_step": stopped_at, "clear_error": clear, "temporaries_left": temporaries,
                "identical": identical, "error": lines[-1][:160] if lines else "",
                "survived": identical and clear and not temporaries and stopped_at < FAULT_STEPS}
    finally:
        subprocess.run(["umount", str(disk)], capture_output=True)


def _peak_rss_mb(code: str, cwd: Path) -> tuple[float, float]:
    """Peak memory (MB) and wall seconds of `code` run in a fresh Python process."""
    probe = f"import time; from tinyrnnt.runtime import peak_rss_mb; t = time.perf_counter()\n{code}\n" \
            "print(peak_rss_mb(), time.perf_counter() - t)"
    out = subprocess.run([sys.executable, "-c", probe], cwd=cwd, capture_output=True, text=True, check=True)
    mb, s = out.stdout.split()[-2:]
    return float(mb), float(s)


def run_fault_bench(args) -> dict:
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp)
        corpus = root / "corpus"
        _tiny_corpus(corpus, train_utts=5000)
        _cli(["train", "--quiet", f"run_dir={root / 'runs' / 'ok'}", f"data.corpus={corpus}", "train.steps=4",
              "bias.kind=trie", "bias.cue_dim=8", *TINY], root)
        ckpt = root / "runs" / "ok" / "checkpoints" / "last.ckpt"
        user = root / "user_folder"
        user.mkdir()
        (user / "notes.txt").write_text("a user's own file")
        saved_config = (ckpt.parent.parent / "config.yaml").read_text()
        clear, tracebacks, partial, outcomes = 0, 0, [], {}
        with write_traps(root) as traps:
            cases = catalogue(root, corpus, ckpt, traps)
            for name, argv in cases:
                out = _cli(argv, root)
                lines = [ln for ln in out.stderr.strip().splitlines() if ln.strip()]
                ok = out.returncode == 2 and bool(lines) and lines[-1].startswith("error: ") and "Traceback" not in out.stderr
                clear += ok
                tracebacks += "Traceback" in out.stderr
                outcomes[name] = "clear" if ok else f"exit {out.returncode}: {(lines or [''])[-1][:160]}"
                partial += _partial_files(root)
                _log(f"{name:36s} {outcomes[name]}")
        deletions = int((user / "notes.txt").read_text() != "a user's own file")
        deletions += int((ckpt.parent.parent / "config.yaml").read_text() != saved_config)
        # the faults: every random stream in play (model dropout, the trie's cue dropout, training lists)
        fault_args = [f"data.corpus={corpus}", f"train.steps={FAULT_STEPS}", "bias.kind=trie", "bias.cue_dim=8", *TINY]
        _cli(["train", "--quiet", f"run_dir={root / 'straight'}", *fault_args], root)
        straight = root / "straight" / "checkpoints" / "last.ckpt"
        _log("kill a training process at a random step, resume, compare with an uninterrupted run ...")
        killed = kill_and_resume(root, corpus, fault_args, straight, random.Random())
        _log(f"  {killed}")
        _log("fill the disk during training, resume once there is room, compare ...")
        full = disk_fills_during_training(root, fault_args, straight)
        _log(f"  {full if full is not None else 'not tried: mounting a small disk needs root'}")
        faults = [killed] + ([full] if full is not None else [])
        big = ("import torch; from tinyrnnt.bias.trie import invented_words; import numpy as np\n"
               "from tinyrnnt.data import CorpusSplit; from tinyrnnt.lab.evaluate import evaluate\n"
               "from tinyrnnt.lab.train import load_model\n"
               f"m = load_model({str(ckpt)!r})[0]; words = invented_words(100000, np.random.default_rng(0))\n"
               f"evaluate(m, CorpusSplit({str(corpus)!r}, 'test'), fixed_list=words)")
        rss_100k, _ = _peak_rss_mb(big, root)
        timing = {}
        for n in (1000, 5000):
            code = ("from tinyrnnt.data import CorpusSplit; from tinyrnnt.lab.evaluate import evaluate\n"
                    f"from tinyrnnt.lab.train import load_model; m = load_model({str(ckpt)!r})[0]\n"
                    f"evaluate(m, CorpusSplit({str(corpus)!r}, 'train', limit={n}), list_size=0)")
            timing[n] = _peak_rss_mb(code, root)
        wheel_ok = wheel_main_job(root, corpus)
    return {
        "bad_inputs_tried": len(cases),
        "clear_errors": clear,
        "tracebacks": tracebacks,
        "partial_files": len(partial),
        "partial_file_names": partial[:5],
        "surprise_deletions": deletions,
        "faults_injected": len(faults),  # a training process killed, and (as root) a disk filled mid-run
        "faults_survived_identical": sum(f["survived"] for f in faults),
        "kill_resumed_from_step": killed["resumed_from_step"],
        "full_disk_fault": full,
        "peak_rss_mb_100k_list": round(rss_100k, 1),
        "decode_s_1000_vs_5000_utts": [round(timing[1000][1], 2), round(timing[5000][1], 2)],
        "peak_rss_mb_5000_utts": round(timing[5000][0], 1),
        "wheel_install_main_job_ok": wheel_ok,
        "outcomes": outcomes,
    }


def wheel_main_job(root: Path, corpus: Path) -> bool:
    """Build a wheel, install it away from the checkout, run the main job (tiny settings) from it."""
    project = Path(__file__).resolve().parents[2]
    built = subprocess.run([sys.executable, "-m", "pip", "wheel", str(project), "-w", str(root / "wheel"),
                            "--no-deps", "--no-build-isolation", "-q"], capture_output=True, text=True)
    if built.returncode != 0:
        return False
    site = root / "site"
    subprocess.run([sys.executable, "-m", "pip", "install", "--no-deps", "-q", "--target", str(site),
                    str(next((root / "wheel").glob("*.whl")))], check=True, capture_output=True)
    env = {**os.environ, "PYTHONPATH": str(site)}
    away = root / "elsewhere"
    away.mkdir()
    out = _cli(["experiment", "--quiet", "--recipe", "quickstart", f"data.corpus={corpus}", "train.steps=2", *TINY,
                "evaluate.splits=[test]", "evaluate.list_sizes=[0,10]", "evaluate.limit=16"], away, env=env)
    done = away / "runs" / "quickstart"
    return out.returncode == 0 and (done / "results.md").is_file() and (done / "report" / "report.html").is_file()
