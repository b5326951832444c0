"""Smoke test: synthesize, train (baseline and trie), decode, score, table — a tiny corpus in seconds."""

import json
from pathlib import Path

import torch

import pytest

from tinyrnnt.lab.recipes import run_recipe
from tinyrnnt.lab.train import CheckpointError, load_model
from tinyrnnt.synth.corpus import CorpusConfig, build_corpus
from tinyrnnt.synth.sentences import TextConfig

TINY = dict(train_utts=160, valid_utts=16, test_utts=16, test_unseen_utts=16, test_soundalike_utts=8, max_list_size=200,
            list_sizes=(0, 10), train_speakers=4, heldout_speakers=2, workers=1,
            text=TextConfig(n_invented_names=500, n_compounds=150, few_shot_share=0.004,
                            extra_styles={"fell": 40, "reed": 30}))


@pytest.fixture(scope="module")
def corpus(tmp_path_factory):
    folder = tmp_path_factory.mktemp("smoke") / "corpus"
    build_corpus(CorpusConfig(seed=5, **TINY), folder, quiet=True)
    return folder


def test_whole_pipeline(corpus, tmp_path):
    recipe = tmp_path / "smoke.yaml"
    recipe.write_text(f"""
name: smoke
out_dir: {tmp_path / 'runs'}
shared:
  data: {{corpus: {corpus}, batch_size: 16, valid_subset: 16}}
  model: {{encoder_dim: 32, predictor_dim: 32, predictor_embed: 16, joiner_dim: 24, encoder_layers: 2}}
  train: {{steps: 6, minutes: 0, validate_every_steps: 4, threads: 1, snapshot_minutes: 0}}
runs:
  baseline: {{}}
  trie: {{bias: {{kind: trie, cue_dim: 8, token_boost: true}}, train: {{init_from: "run:baseline", steps: 4}}}}
evaluate:
  splits: [test_unseen, test_soundalike]
  list_sizes: [0, 10]
  decoding:
    greedy: {{}}
    beam_fusion: {{search: beam, beam: 2, boost_weight: tuned}}
  tune: {{list_size: 10, weights: [0, 2], model_scales: [0, 1]}}
""")
    rows = run_recipe(recipe, quiet=True)
    runs = {"baseline", "trie", "trie_control"}
    assert {(r["run"], r["decoding"], r["split"], r["list_size"]) for r in rows} == {
        (run, d, split, n) for run in runs for d in ("greedy", "beam_fusion")
        for split in ("test_unseen", "test_soundalike") for n in (0, 10)}
    tuned = {r["run"]: r["boost_weight"] for r in rows if r["decoding"] == "beam_fusion"}
    assert set(tuned.values()) <= {0.0, 2.0}
    trie_curve = json.loads((tmp_path / "runs" / "smoke" / "trie" / "results" / "boost_curve.beam_fusion.json").read_text())
    assert [(r["weight"], r["model_boost_scale"]) for r in trie_curve["rows"]] == [(0.0, 1.0), (2.0, 1.0), (2.0, 0.0)]
    control_curve = json.loads((tmp_path / "runs" / "smoke" / "trie_control" / "results" /
                                "boost_curve.beam_fusion.json").read_text())
    assert len(control_curve["rows"]) == 2  # no token boost of its own: the weight alone
    assert (tmp_path / "runs" / "smoke" / "trie" / "results" / "boost_curve.beam_fusion.png").is_file()
    rows = [r for r in rows if r["decoding"] == "greedy"]
    # equal training: the trie arm and its control both stand on the baseline's 6 steps plus 4 of their own
    steps = {r["run"]: r["steps"] for r in rows}
    assert steps == {"baseline": 6, "trie": 10, "trie_control": 10}
    folder = tmp_path / "runs" / "smoke"
    table = json.loads((folder / "results.json").read_text())
    assert [r for r in table if r["decoding"] == "greedy"] == json.loads(json.dumps(rows))
    comparisons = json.loads((folder / "comparisons.json").read_text())
    comparisons = [c for c in comparisons if c["decoding"] == "greedy"]
    assert {(c["system"], c["against"], c["role"]) for c in comparisons} == {
        ("trie", "trie_control", "control"), ("trie", "baseline", "start")}
    assert all(c["steps"] == c["against_steps"] for c in comparisons if c["role"] == "control")
    assert "interval" in (folder / "results.md").read_text()
    ckpt = folder / "trie" / "checkpoints" / "last.ckpt"
    model, cfg, _ = load_model(ckpt)
    assert cfg.bias.kind == "trie" and model.bias is not None
    assert load_model(folder / "trie_control" / "checkpoints" / "last.ckpt")[1].bias.kind == "none"
    assert (ckpt.parent / "config.yaml").is_file()
    hyps = (folder / "trie" / "results" / "test_unseen.n10.hyps.jsonl").read_text().splitlines()
    assert len(hyps) == 16

    # beam search with the trie cue and shallow fusion, on the trained trie arm
    from tinyrnnt.data import CorpusError, CorpusSplit
    from tinyrnnt.lab.evaluate import evaluate, save_results
    from tinyrnnt.lab.fusion import sweep_boost, write_curve

    split = CorpusSplit(corpus, "test_unseen")
    boost = {"weight": 1.0, "where": "after_trigger", "triggers": {"invented_name": ["call", "to"]}}
    records, summary = evaluate(model, split, list_size=10, search="beam", beam=3, boost=boost)
    assert summary["search"] == "beam" and summary["boost_weight"] == 1.0 and len(records) == 16
    assert all(r["nbest"] and r["nbest"][0][0] == r["hyp"] for r in records)
    assert all([s for _, s in r["nbest"]] == sorted((s for _, s in r["nbest"]), reverse=True) for r in records)
    save_results(tmp_path / "beam", "t", records, summary)
    assert len((tmp_path / "beam" / "t.nbest.jsonl").read_text().splitlines()) == 16
    with pytest.raises(CorpusError, match="class 'crew' is not a class of the biasing list's entries"):
        evaluate(model, split, list_size=10, search="beam", boost=dict(boost, triggers={"crew": ["call"]}))
    sweep = sweep_boost(model, str(corpus), weights=(0.0, 2.0), list_size=10, beam=2)
    assert [r["weight"] for r in sweep["rows"]] == [0.0, 2.0] and sweep["chosen"] in (0.0, 2.0)
    # the model's own boost switched off while fusing: the token scores go, and only for that call
    assert model.token_boost_scale == 1.0
    _, off = evaluate(model, split, list_size=10, search="beam", beam=2, boost=dict(boost, model_scale=0.0))
    assert off["model_boost_scale"] == 0.0 and model.token_boost_scale == 1.0
    paths = write_curve(tmp_path / "curve", "boost", sweep)
    assert all(p.is_file() for p in paths) and paths[2].read_bytes()[:4] == b"\x89PNG"


def test_a_control_arm_needs_a_step_budget(tmp_path):
    from tinyrnnt.config import ConfigError
    from tinyrnnt.lab.recipes import expand_arms, read_recipe

    recipe = tmp_path / "r.yaml"
    recipe.write_text("runs: {baseline: {}, trie: {bias: {kind: trie}, train: {init_from: 'run:baseline'}}}\n")
    with pytest.raises(ConfigError, match="control arm needs a step budget"):
        expand_arms(read_recipe(recipe))


def test_from_scratch_pairing_and_seeds_expand_to_equal_budgets(tmp_path):
    from tinyrnnt.lab.recipes import expand_arms, read_recipe

    recipe = tmp_path / "r.yaml"
    recipe.write_text("pairing: from_scratch\nseeds: [0, 1]\n"
                      "shared: {train: {steps: 50}}\n"
                      "runs: {baseline: {}, trie: {bias: {kind: trie}, train: {init_from: 'run:baseline', steps: 30}}}\n")
    arms = expand_arms(read_recipe(recipe))
    assert list(arms) == ["baseline/seed0", "trie/seed0", "trie_control/seed0",
                          "baseline/seed1", "trie/seed1", "trie_control/seed1"]
    trie, ctl = arms["trie/seed1"], arms["trie_control/seed1"]
    assert trie.cfg.train.init_from == ctl.cfg.train.init_from == "" and trie.source is None
    assert trie.cfg.train.steps == ctl.cfg.train.steps == 80 and trie.cfg.train.seed == 1
    assert trie.control == "trie_control/seed1" and ctl.cfg.bias.kind == "none"


def test_training_again_in_a_used_run_folder_keeps_the_earlier_checkpoints_apart(corpus, tmp_path):
    from tinyrnnt.experiment import load_experiment
    from tinyrnnt.lab.train import train

    cfg = load_experiment(None, [f"data.corpus={corpus}", f"run_dir={tmp_path / 'run'}", "data.batch_size=16",
                                 "data.valid_subset=16", "model.encoder_dim=32", "model.predictor_dim=32",
                                 "model.joiner_dim=24", "model.encoder_layers=2", "train.minutes=0.2",
                                 "train.max_epochs=1", "train.validate_every_steps=4", "train.threads=1",
                                 "train.snapshot_minutes=0"])
    first = train(cfg, quiet=True)
    second = train(cfg, quiet=True)
    ckpts = tmp_path / "run" / "checkpoints"
    assert second.best_checkpoint == ckpts / "best.ckpt" == first.best_checkpoint
    assert sorted(p.name for p in ckpts.glob("*.ckpt")) == ["best.ckpt", "last.ckpt"]  # no "best-v1.ckpt"
    assert (tmp_path / "run" / "checkpoints.previous" / "best.ckpt").is_file()


def test_damaged_checkpoint_is_one_clear_sentence(tmp_path):
    bad = tmp_path / "broken.ckpt"
    bad.write_bytes(b"not a checkpoint")
    with pytest.raises(CheckpointError, match="not a readable checkpoint"):
        load_model(bad)
    with pytest.raises(CheckpointError, match="not found"):
        load_model(tmp_path / "missing.ckpt")


SMALL_RUN = ["data.batch_size=16", "data.valid_subset=16", "model.encoder_dim=32", "model.predictor_dim=32",
             "model.joiner_dim=24", "model.encoder_layers=2", "train.validate_every_steps=4", "train.threads=1",
             "train.snapshot_minutes=0", "train.minutes=0"]


def test_same_seed_and_steps_give_the_same_weights_and_a_history_through_init_from(corpus, tmp_path):
    from tinyrnnt.experiment import load_experiment
    from tinyrnnt.lab.train import read_history, train

    def run(name, *extra):
        cfg = load_experiment(None, [f"data.corpus={corpus}", f"run_dir={tmp_path / name}", *SMALL_RUN, *extra])
        return train(cfg, quiet=True)

    a, b = run("a", "train.steps=6"), run("b", "train.steps=6")
    wa = load_model(a.last_checkpoint)[0]
    wb = load_model(b.last_checkpoint)[0]
    assert a.steps == b.steps == 6
    assert all(torch.equal(x, y) for x, y in zip(wa.state_dict().values(), wb.state_dict().values()))
    c = run("c", "train.steps=6", "train.seed=1")
    wc = load_model(c.last_checkpoint)[0]
    assert not all(torch.equal(x, y) for x, y in zip(wa.state_dict().values(), wc.state_dict().values()))
    # a fine-tuned run counts the steps and seconds of the run it starts from
    d = run("d", "train.steps=4", f"train.init_from={a.last_checkpoint}", "bias.kind=trie", "bias.cue_dim=8")
    h = read_history(d.last_checkpoint)
    assert h["steps"] == 10 and [r["steps"] for r in h["runs"]] == [6, 4]
    assert h["seconds"] == pytest.approx(a.history["seconds"] + d.train_seconds, abs=0.05)


def test_experiment_resume_keeps_finished_arms_and_evaluations(corpus, tmp_path):
    recipe = tmp_path / "r.yaml"
    recipe.write_text(f"""
name: again
out_dir: {tmp_path / 'runs'}
shared:
  data: {{corpus: {corpus}, batch_size: 16, valid_subset: 16}}
  model: {{encoder_dim: 32, predictor_dim: 32, predictor_embed: 16, joiner_dim: 24, encoder_layers: 2}}
  train: {{steps: 4, minutes: 0, validate_every_steps: 4, threads: 1, snapshot_minutes: 0}}
runs:
  baseline: {{}}
evaluate: {{splits: [test_unseen], list_sizes: [0]}}
""")
    first = run_recipe(recipe, quiet=True)
    ckpt = tmp_path / "runs" / "again" / "baseline" / "checkpoints" / "last.ckpt"
    scores = tmp_path / "runs" / "again" / "baseline" / "results" / "test_unseen.n0.scores.json"
    stamps = ckpt.stat().st_mtime_ns, scores.stat().st_mtime_ns
    again = run_recipe(recipe, quiet=True, resume=True)
    assert again == first and (ckpt.stat().st_mtime_ns, scores.stat().st_mtime_ns) == stamps


def _small_recipe(tmp_path, corpus, name: str, runs: str, evaluate: str) -> str:
    """A recipe text with one tiny model and 4 training steps per run, no control arms; `runs` and
    `evaluate` are the YAML under those keys (runs indented by two spaces)."""
    return f"""
name: {name}
out_dir: {tmp_path / 'runs'}
controls: false
shared:
  data: {{corpus: {corpus}, batch_size: 16, valid_subset: 16}}
  model: {{encoder_dim: 32, predictor_dim: 32, predictor_embed: 16, joiner_dim: 24, encoder_layers: 2}}
  train: {{steps: 4, minutes: 0, validate_every_steps: 4, threads: 1, snapshot_minutes: 0}}
runs:
{runs}
evaluate: {evaluate}
"""


def test_resume_evaluates_again_when_the_run_switches_spotting_on(corpus, tmp_path):
    """decode.spotting belongs to the run, not to the recipe's decodings: a result decoded without
    it must not be read back for a run that now spots (nor the other way round)."""
    import json as _json

    def recipe(spot: bool):
        path = tmp_path / "r.yaml"
        path.write_text(_small_recipe(
            tmp_path, corpus, "spots",
            f"  trie:\n    bias: {{kind: trie, cue_dim: 8, token_boost: true, boost_mode: mix_heard}}\n"
            f"    decode: {{spotting: {str(spot).lower()}}}",
            "{splits: [test_unseen], list_sizes: [10], limit: 8}"))
        return path

    run_recipe(recipe(False), quiet=True)
    scores = tmp_path / "runs" / "spots" / "trie" / "results" / "test_unseen.n10.scores.json"
    stamp = scores.stat().st_mtime_ns
    run_recipe(recipe(False), quiet=True, resume=True)
    assert scores.stat().st_mtime_ns == stamp  # same settings: read back
    run_recipe(recipe(True), quiet=True, resume=True)
    saved = _json.loads(scores.read_text())
    assert scores.stat().st_mtime_ns != stamp and saved["spotting_asked"] is True and saved["spotting"] is True


def test_a_failed_start_leaves_no_run_folder_and_a_mistyped_corpus_is_an_error(corpus, tmp_path):
    from tinyrnnt.config import ConfigError
    from tinyrnnt.data import CorpusError
    from tinyrnnt.experiment import load_experiment
    from tinyrnnt.lab.recipes import ensure_corpus
    from tinyrnnt.lab.train import train

    cfg = load_experiment(None, [f"data.corpus={corpus}", f"run_dir={tmp_path / 'bad'}", *SMALL_RUN,
                                 "train.steps=2", "train.trainer={no_such_setting: 1}"])
    with pytest.raises(ConfigError, match="no_such_setting"):
        train(cfg, quiet=True)
    assert not (tmp_path / "bad").exists()
    typo = load_experiment(None, [f"data.corpus={tmp_path / 'corpsu'}"])
    with pytest.raises(CorpusError, match="no corpus here"):
        ensure_corpus(typo, quiet=True)
    assert not (tmp_path / "corpsu").exists()


def test_resume_with_other_settings_trains_anew_rather_than_continue_a_finished_run(corpus, tmp_path):
    """A finished arm of another recipe (other list sampling, same model sizes) must not pass for a
    run of the new settings: --resume trains it again, from its own start."""
    from tinyrnnt.lab.train import read_history

    recipe = tmp_path / "r.yaml"
    text = _small_recipe(tmp_path, corpus, "changed",
                         "  trie: {bias: {kind: trie, cue_dim: 8, sampling: {respell_few_shot: RESPELL}}}",
                         "{splits: [test_unseen], list_sizes: [0]}")
    recipe.write_text(text.replace("RESPELL", "0.0"))
    run_recipe(recipe, quiet=True)
    ckpt = tmp_path / "runs" / "changed" / "trie" / "checkpoints" / "last.ckpt"
    before = torch.load(ckpt, map_location="cpu", weights_only=False)["state_dict"]
    recipe.write_text(text.replace("RESPELL", "1.0"))
    run_recipe(recipe, quiet=True, resume=True)
    after = torch.load(ckpt, map_location="cpu", weights_only=False)["state_dict"]
    assert read_history(ckpt)["steps"] == 4  # trained anew for its 4 steps, not stopped at once
    assert any(not torch.equal(before[k], after[k]) for k in before)  # other lists, other weights


def test_sounds_like_spellings_reach_the_decoder_and_come_back_as_entries(corpus, monkeypatch):
    # Decoding is replaced by "write the first sounds-like spelling the decoder was given": the
    # decoder must see the expanded lists, and scoring must see the listed entry.
    import tinyrnnt.lab.evaluate as E
    from tinyrnnt.bias.base import BiasConfig
    from tinyrnnt.data import CorpusSplit
    from tinyrnnt.model.transducer import ModelConfig, Transducer
    from tinyrnnt.text import encode

    split = CorpusSplit(corpus, "test_unseen")
    model = Transducer(ModelConfig(feature_bins=split.card["features"]["mels"], encoder_dim=16, predictor_dim=16,
                                   predictor_embed=8, joiner_dim=8, encoder_layers=2),
                       BiasConfig(kind="trie", cue_dim=8))
    given = []
    monkeypatch.setattr(model.bias, "decoder", lambda lists: given.append(lists) or None)
    inventory = set(split.pronunciations())

    def first_spelling(model, feats, feat_lens, max_symbols=4, biaser=None):
        return [encode(next(w for w in lst if w not in inventory)) for lst in given[-1]]

    monkeypatch.setattr(E, "greedy_decode", first_spelling)
    records, summary = E.evaluate(model, split, list_size=10, sounds_like=4)
    assert summary["sounds_like"] == 4 and len(records) == len(split)
    for r, lst in zip(records, [x for batch in given for x in batch]):
        spelling = r["decoded_as"]
        entry = r["hyp"]
        assert spelling in lst and entry in lst[:10] and spelling not in inventory
        assert spelling in E.corpus_key(split).respell(split.pronunciations()[entry], 4)


def test_bf16_training_keeps_the_loss_in_float32_and_records_the_precision(corpus, tmp_path):
    # bfloat16 autocast on the CPU (torch.autocast, a general-purpose library feature): the joiner's
    # logits come out in bfloat16, the transducer loss is computed in float32.
    from tinyrnnt import config as C
    from tinyrnnt.config import ConfigError
    from tinyrnnt.data import CorpusSplit, loader
    from tinyrnnt.experiment import ExperimentConfig
    from tinyrnnt.lab.train import read_history, train
    from tinyrnnt.model.training import chosen_precision, cpu_has_bf16_units
    from tinyrnnt.model.transducer import Transducer

    cfg = C.apply_overrides(ExperimentConfig(), [
        f"data.corpus={corpus}", "data.batch_size=8", "data.valid_subset=8", f"run_dir={tmp_path / 'bf16'}",
        "model={encoder_dim: 32, predictor_dim: 32, predictor_embed: 16, joiner_dim: 24, encoder_layers: 2}",
        "train.steps=3", "train.minutes=0", "train.validate_every_steps=3", "train.threads=1",
        "train.snapshot_minutes=0", "train.precision=bf16"])
    model = Transducer(cfg.model)
    batch = next(iter(loader(CorpusSplit(corpus, "train", limit=8), 8)))
    with torch.autocast("cpu", dtype=torch.bfloat16):
        out = model.losses(batch["feats"], batch["feat_lens"], batch["targets"], batch["target_lens"])
        logits = model._run(batch["feats"], batch["feat_lens"], batch["targets"], batch["target_lens"],
                            None, None, False)[0]
    assert logits.dtype == torch.bfloat16
    assert out["rnnt"].dtype == torch.float32 and torch.isfinite(out["rnnt"])
    result = train(cfg, quiet=True)
    assert read_history(result.last_checkpoint)["runs"][-1]["precision"] == "bf16"
    assert chosen_precision("auto") == ("bf16" if cpu_has_bf16_units() else "fp32")
    assert chosen_precision("fp32") == "fp32" and chosen_precision("auto", "gpu") == "bf16"
    with pytest.raises(ConfigError, match="train.precision must be one of"):
        C.apply_overrides(ExperimentConfig(), ["train.precision=fp16"])


def test_quickstart_benchmark_parts_on_a_tiny_corpus(corpus, tmp_path):
    # The benchmark's own code on the tiny corpus: the main job run as a new process in an empty
    # folder and its headline read back; the training-step comparison of every biasing input.
    import shutil

    from tinyrnnt.lab.quickstartbench import run_quickstart, step_costs

    tiny = ["model.encoder_dim=32", "model.predictor_dim=32", "model.predictor_embed=16", "model.joiner_dim=24",
            "model.encoder_layers=2", "train.steps=4", "data.batch_size=16", "data.valid_subset=16",
            "train.validate_every_steps=4", "train.snapshot_minutes=0", "evaluate.list_sizes=[10,100]"]
    own = tmp_path / "corpus"
    shutil.copytree(corpus, own)
    out = run_quickstart(tmp_path / "work", (f"data.corpus={own}", *tiny), corpus=own)
    assert out["train_steps"] == {"baseline": 4, "trie": 8, "trie_control": 8}
    assert out["bwer_delta_ci_low"] <= out["bwer_delta_ci_high"] and 0 <= out["prob_improvement"] <= 1
    assert sum(out["quickstart_stages_s"].values()) == pytest.approx(out["quickstart_s"], abs=0.2)
    assert out["report_path"].endswith("report.html") and Path(out["report_path"]).is_file()
    costs = step_costs(str(corpus), batch_size=2, repeats=1, list_size=10)
    assert set(costs["step_cost_ratios"]) == {"trie", "attention", "trie+attention"}
    assert all(v > 0 for v in costs["train_step_ms"].values())


def test_quiet_training_prints_no_accelerator_banner(corpus, tmp_path, capfd):
    # A benchmark's quiet training printed Lightning's "GPU available: False, used: False" and
    # "TPU available" lines at every arm; quiet now means quiet.
    from tinyrnnt import config as C
    from tinyrnnt.experiment import ExperimentConfig
    from tinyrnnt.lab.train import train

    cfg = C.apply_overrides(ExperimentConfig(), [
        f"data.corpus={corpus}", "data.batch_size=8", "data.valid_subset=8", f"run_dir={tmp_path / 'quiet'}",
        "model={encoder_dim: 32, predictor_dim: 32, predictor_embed: 16, joiner_dim: 24, encoder_layers: 2}",
        "train.steps=2", "train.minutes=0", "train.validate_every_steps=2", "train.threads=1",
        "train.snapshot_minutes=0"])
    train(cfg, quiet=True)
    out, err = capfd.readouterr()
    assert "GPU available" not in out + err and "TPU available" not in out + err
    assert "log_every_n_steps" not in out + err
