"""The `trie` benchmark: trie-based deep biasing against its equal-steps control arm and the baseline.

The recipe (tinyrnnt/recipes/trie_vs_baseline.yaml) trains a baseline for a step budget,
then the trie arm and its control from the baseline's last checkpoint for the
same steps, schedule and data order. Gains are stated against the control; the
baseline stays as a second reference. Greedy decoding everywhere; the headline
split (unseen names, N = 100) and the no-list test also with beam search (beam
4), both arms decoded alike. Also measured: the held-out name style,
sound-alike false triggers, lists carrying sounds-like spellings of each entry
(tinyrnnt.bias.soundslike; both arms decode the same lists), a repeated short
run for determinism, the cue's
cost against list size, and the whole recipe's time.
"""

from __future__ import annotations

import json
import sys
import time
from pathlib import Path

from tinyrnnt.lab.evaluate import evaluate, save_results, write_atomic
from tinyrnnt.lab.triechecks import cue_cost_ratio, repeat_check
RECIPE = "trie_vs_baseline"  # the built-in recipe
HELDOUT = "style:reed"  # label of the held-out name style in the default corpus
BEAM = 4  # beam width of the beam-search figures
# Sounds-like spellings per list entry in the figures with pronunciation-carrying lists. Chosen on
# the valid split at N = 100 with the trie arm of the run of record (2026-12-02): the smallest
# number within 0.002 of the best WER (more spellings cost decoding time). WER / B-WER by number:
# 0: 0.125 / 0.270, 8: 0.113 / 0.206, 16: 0.108 / 0.183, 32: 0.105 / 0.174, 64: 0.104 / 0.167,
# 128: 0.103 / 0.165.
SOUNDS_LIKE = 32


def _log(msg: str) -> None:
    print(msg, file=sys.stderr, flush=True)


def train_recipe(args):
    """The recipe's arms, trained (or read back from RUN_DIR/trained.json when the settings match)."""
    from tinyrnnt import config as C
    from tinyrnnt.lab.recipes import ensure_corpus, expand_arms, read_recipe, train_arms

    recipe = read_recipe(RECIPE)
    recipe.out_dir = str(Path(args.run_dir).parent)
    recipe.name = Path(args.run_dir).name
    recipe.seeds = tuple(range(args.seeds))
    overrides = [f"data.corpus={args.corpus}"] + ([f"train.minutes={args.minutes}"] if args.minutes else [])
    arms = expand_arms(recipe, overrides)
    ensure_corpus(next(iter(arms.values())).cfg, build=True)
    corpus_s = json.loads((Path(args.corpus) / "build.json").read_text())["build_seconds"]
    facts_path = Path(args.run_dir) / "trained.json"
    wanted = {key: C.to_dict(arm.cfg) for key, arm in arms.items()}
    trained = json.loads(facts_path.read_text()) if facts_path.is_file() else None
    def training_part(configs: dict) -> dict:  # decoding settings do not change what is trained
        from tinyrnnt.lab.recipes import _training_part

        return {k: _training_part(c) for k, c in configs.items()}

    if trained is not None and training_part(trained.get("configs", {})) != training_part(wanted):
        _log(f"{facts_path} was trained with other settings: training again")
        trained = None
    if args.fresh or trained is None:
        t0 = time.perf_counter()
        if args.resume:
            _log("*** --resume: arms already trained in this run folder with the same settings are reused ***")
        trained = {"arms": train_arms(arms, recipe.parallel, quiet=True, resume=args.resume), "configs": wanted,
                   "wall_seconds": time.perf_counter() - t0}
        write_atomic(facts_path, json.dumps(trained, indent=1))
    else:
        _log(f"*** REUSING EARLIER TRAINING from {facts_path} (trained {trained['wall_seconds']:.0f} s); "
             "its figures are quoted as they were. Use --fresh to train again. ***")
    return recipe, arms, trained, corpus_s


def run_trie_bench(args) -> dict:
    import torch

    from tinyrnnt.bias.spotting import can_spot
    from tinyrnnt.data import CorpusSplit
    from tinyrnnt.lab.train import load_model, read_history
    from tinyrnnt.score import compare_systems

    small, large, ratio = cue_cost_ratio()
    _log(f"cue ms: N=10 {small:.2f}, N=5000 {large:.2f} (ratio {ratio:.2f})")
    t_start = time.perf_counter()
    recipe, arms, trained, corpus_s = train_recipe(args)
    t_eval = time.perf_counter()
    torch.set_num_threads(2)
    # (split, N, confusable lists, search): greedy everywhere; beam search (beam 4, the decoder
    # results are usually quoted with) where the headline figures are
    # The last element: sounds-like spellings per list entry (0 = lists as given).
    plan = [("test_unseen", n, False, "greedy", 0) for n in (0, 10, 100, 1000)] + [
        ("test_unseen", 100, True, "greedy", 0), ("test", 0, False, "greedy", 0),
        ("test_soundalike", 100, False, "greedy", 0), ("test_unseen", 100, False, "beam", 0),
        ("test", 0, False, "beam", 0), ("test_unseen", 100, False, "greedy", SOUNDS_LIKE),
        ("test_unseen", 100, False, "beam", SOUNDS_LIKE), ("test_soundalike", 100, False, "greedy", SOUNDS_LIKE)]
    # Further training seeds are decoded only where their spread is reported: the trie arm and its
    # control on test_unseen at N = 100, greedy, with lists as given and with sounds-like spellings,
    # and on the in-domain test with no list.
    seed_plan = [("test_unseen", 100, False, "greedy", 0), ("test_unseen", 100, False, "greedy", SOUNDS_LIKE),
                 ("test", 0, False, "greedy", 0)]
    # The trie arm decodes as its recipe says (decode.spotting: keyword spotting steers its mixing
    # boost); where it spots, the headline lists are also decoded without spotting: the cue alone.
    cue_only_plan = [("test_unseen", 100, False, "greedy", 0), ("test_unseen", 100, False, "greedy", SOUNDS_LIKE)]
    first = f"/seed{recipe.seeds[0]}" if len(recipe.seeds) > 1 else ""
    results: dict[tuple, tuple] = {}
    for key in arms:
        further_seed = not key.endswith(first)
        if further_seed and key.startswith("baseline"):
            continue
        model = load_model(trained["arms"][key]["last_checkpoint"])[0]
        spots = arms[key].cfg.decode.spotting and can_spot(model)
        runs = [(*p, spots) for p in (seed_plan if further_seed else plan)]
        if spots and not further_seed:
            runs += [(*p, False) for p in cue_only_plan]
        for split_name, n, confusable, search, sounds_like, spot in runs:
            if sounds_like and key.startswith("baseline"):
                continue  # the sounds-like figures compare the trie arm with its control only
            split = CorpusSplit(args.corpus, split_name)
            records, summary = evaluate(model, split, list_size=n, confusable=confusable, search=search, beam=BEAM,
                                        sounds_like=sounds_like, spotting=spot)
            name = (f"{split_name}.n{n}" + (".confusable" if confusable else "")
                    + (f".sounds_like{sounds_like}" if sounds_like else "") + (f".beam{BEAM}" if search == "beam" else "")
                    + (".spotting" if spot else ""))
            save_results(Path(arms[key].cfg.run_dir) / "results", name, records, summary)
            cue_only = spots and not spot  # the trie arm's extra decoding without spotting
            results[(key, split_name, n, confusable, search, sounds_like, cue_only)] = (records, summary)
            _log(f"{key:20s} {name:28s} WER {summary['wer']:.3f} U-WER {summary['uwer'] or 0:.3f} "
                 f"B-WER {summary['bwer'] if summary['bwer'] is not None else float('nan'):.3f} "
                 f"false-trigger {summary['false_trigger_rate'] or 0:.3f}")
    eval_s = time.perf_counter() - t_eval
    trie_arm = arms[f"trie{first}"]
    t_check = time.perf_counter()
    same = repeat_check(trie_arm.cfg, trained["arms"][trie_arm.source]["last_checkpoint"], args.corpus,
                        Path(args.run_dir) / "repeat")
    check_s = time.perf_counter() - t_check
    _log(f"repeated short run gives identical weights and metrics: {same} ({check_s:.0f} s)")

    def s(run, split="test_unseen", n=100, confusable=False, seed_key=first, search="greedy", sounds_like=0,
          cue_only=False):
        return results[(run + seed_key, split, n, confusable, search, sounds_like, cue_only)][1]

    def counts(run, split="test_unseen", n=100, seed_key=first, search="greedy", sounds_like=0, cue_only=False):
        return {r["id"]: r["counts"]
                for r in results[(run + seed_key, split, n, False, search, sounds_like, cue_only)][0]}

    def cue_only_figures() -> dict:
        """The trie arm decoded without spotting (the cue and its trained boost alone), where it spots."""
        if (f"trie{first}", "test_unseen", 100, False, "greedy", 0, True) not in results:
            return {"spotting": False}
        out = {"spotting": True}
        for sl, tag in ((0, ""), (SOUNDS_LIKE, "_sounds_like")):
            k = dict(sounds_like=sl)
            trie, control = s("trie", cue_only=True, **k), s("trie_control", **k)
            ci = compare_systems(counts("trie_control", **k), counts("trie", cue_only=True, **k), rate="bwer")
            held, held_control = trie.get(f"bwer:{HELDOUT}"), control.get(f"bwer:{HELDOUT}")
            out.update({
                f"bwer_trie_cue_only{tag}_n100": r3(trie["bwer"]),
                f"bwer_reduction_vs_control_cue_only{tag}_n100": r3(1 - trie["bwer"] / control["bwer"]),
                f"bwer_delta_vs_control_ci95_cue_only{tag}_n100": [r3(ci["low"]), r3(ci["high"])],
                f"uwer_trie_cue_only{tag}_n100": r3(trie["uwer"]),
                f"recall_trie_cue_only{tag}_n100": r3(trie["recall"]),
                f"bwer_trie_heldout_style_cue_only{tag}_n100": r3(held),
                f"bwer_reduction_heldout_style_cue_only{tag}_n100": r3(1 - held / held_control) if held_control else None,
            })
        return out

    def reduction(seed_key=first, search="greedy", sounds_like=0):
        return 1 - (s("trie", seed_key=seed_key, search=search, sounds_like=sounds_like)["bwer"]
                    / s("trie_control", seed_key=seed_key, search=search, sounds_like=sounds_like)["bwer"])

    def sounds_like_figures() -> dict:
        """Lists that also carry each entry's sounds-like spellings (both arms decode the same lists)."""
        out = {"sounds_like_spellings": SOUNDS_LIKE}
        for search, tag in (("greedy", ""), ("beam", f"_beam{BEAM}")):
            k = dict(search=search, sounds_like=SOUNDS_LIKE)
            ci = compare_systems(counts("trie_control", **k), counts("trie", **k), rate="bwer")
            uci = compare_systems(counts("trie_control", **k), counts("trie", **k), rate="uwer")
            hc, ht = s("trie_control", **k).get(f"bwer:{HELDOUT}"), s("trie", **k).get(f"bwer:{HELDOUT}")
            out.update({
                f"bwer_control_sounds_like{tag}_n100": r3(s("trie_control", **k)["bwer"]),
                f"bwer_trie_sounds_like{tag}_n100": r3(s("trie", **k)["bwer"]),
                f"bwer_reduction_vs_control_sounds_like{tag}_n100": r3(reduction(search=search, sounds_like=SOUNDS_LIKE)),
                f"bwer_delta_vs_control_ci95_sounds_like{tag}_n100": [r3(ci["low"]), r3(ci["high"])],
                f"uwer_control_sounds_like{tag}_n100": r3(s("trie_control", **k)["uwer"]),
                f"uwer_trie_sounds_like{tag}_n100": r3(s("trie", **k)["uwer"]),
                f"uwer_delta_vs_control_ci95_sounds_like{tag}_n100": [r3(uci["low"]), r3(uci["high"])],
                f"bwer_control_heldout_style_sounds_like{tag}_n100": r3(hc),
                f"bwer_trie_heldout_style_sounds_like{tag}_n100": r3(ht),
                f"bwer_reduction_heldout_style_sounds_like{tag}_n100": r3(1 - ht / hc) if hc else None,
                f"recall_trie_heldout_style_sounds_like{tag}_n100": r3(s("trie", **k).get(f"recall:{HELDOUT}")),
            })
        for arm in ("trie_control", "trie"):
            out[f"false_trigger_soundalike_{arm.replace('trie_', '')}_sounds_like"] = r3(
                s(arm, "test_soundalike", sounds_like=SOUNDS_LIKE)["false_trigger_rate"])
        return out

    def beam_figures() -> dict:
        b = dict(search="beam")
        ci = compare_systems(counts("trie_control", **b), counts("trie", **b), rate="bwer")
        uci = compare_systems(counts("trie_control", **b), counts("trie", **b), rate="uwer")
        wci = compare_systems(counts("trie_control", "test", 0, **b), counts("trie", "test", 0, **b), rate="wer")
        return {
            f"bwer_control_beam{BEAM}_n100": r3(s("trie_control", **b)["bwer"]),
            f"bwer_trie_beam{BEAM}_n100": r3(s("trie", **b)["bwer"]),
            f"bwer_reduction_vs_control_beam{BEAM}_n100": r3(reduction(search="beam")),
            f"bwer_delta_vs_control_ci95_beam{BEAM}_n100": [r3(ci["low"]), r3(ci["high"])],
            f"uwer_control_beam{BEAM}_n100": r3(s("trie_control", **b)["uwer"]),
            f"uwer_trie_beam{BEAM}_n100": r3(s("trie", **b)["uwer"]),
            f"uwer_delta_vs_control_ci95_beam{BEAM}_n100": [r3(uci["low"]), r3(uci["high"])],
            f"wer_control_beam{BEAM}_n0": r3(s("trie_control", "test", 0, **b)["wer"]),
            f"wer_trie_beam{BEAM}_n0": r3(s("trie", "test", 0, **b)["wer"]),
            f"wer_delta_vs_control_ci95_beam{BEAM}_n0": [r3(wci["low"]), r3(wci["high"])],
            f"bwer_control_heldout_style_beam{BEAM}_n100": r3(s("trie_control", **b).get(f"bwer:{HELDOUT}")),
            f"bwer_trie_heldout_style_beam{BEAM}_n100": r3(s("trie", **b).get(f"bwer:{HELDOUT}")),
            f"recall_trie_heldout_style_beam{BEAM}_n100": r3(s("trie", **b).get(f"recall:{HELDOUT}")),
        }

    bwer_ci = compare_systems(counts("baseline"), counts("trie"), rate="bwer")
    ctl_ci = compare_systems(counts("trie_control"), counts("trie"), rate="bwer")
    uwer_ctl_ci = compare_systems(counts("trie_control"), counts("trie"), rate="uwer")
    wer0_ctl_ci = compare_systems(counts("trie_control", "test", 0), counts("trie", "test", 0), rate="wer")
    recipe_s = corpus_s + trained["wall_seconds"] + eval_s
    r3 = lambda v: None if v is None else round(v, 4)  # noqa: E731
    seeds = [f"/seed{k}" for k in recipe.seeds] if len(recipe.seeds) > 1 else [""]
    reductions = [round(reduction(k), 4) for k in seeds]
    sl_reductions = [round(reduction(k, sounds_like=SOUNDS_LIKE), 4) for k in seeds]

    def heldout_reduction(seed_key):
        k = dict(seed_key=seed_key, sounds_like=SOUNDS_LIKE)
        control = s("trie_control", **k).get(f"bwer:{HELDOUT}")
        return round(1 - s("trie", **k).get(f"bwer:{HELDOUT}") / control, 4) if control else None

    heldout_reductions = [heldout_reduction(k) for k in seeds]
    no_list_deltas = [round(s("trie", "test", 0, seed_key=k)["wer"] - s("trie_control", "test", 0, seed_key=k)["wer"], 4)
                      for k in seeds]
    out = {
        "bwer_baseline_n100": r3(s("baseline")["bwer"]),
        "bwer_control_n100": r3(s("trie_control")["bwer"]),
        "bwer_trie_n100": r3(s("trie")["bwer"]),
        "bwer_reduction_vs_control_n100": r3(reduction()),
        "bwer_delta_vs_control_ci95_n100": [r3(ctl_ci["low"]), r3(ctl_ci["high"])],
        "bwer_relative_reduction_n100": r3(1 - s("trie")["bwer"] / s("baseline")["bwer"]),
        "bwer_delta_ci95_n100": [r3(bwer_ci["low"]), r3(bwer_ci["high"])],
        "uwer_baseline_n100": r3(s("baseline")["uwer"]),
        "uwer_control_n100": r3(s("trie_control")["uwer"]),
        "uwer_trie_n100": r3(s("trie")["uwer"]),
        "uwer_delta_vs_control_ci95_n100": [r3(uwer_ctl_ci["low"]), r3(uwer_ctl_ci["high"])],
        "uwer_parts_control_n100": {k: r3(s("trie_control")[k]) for k in ("uwer_subdel", "uwer_ins_near_biased", "uwer_ins_other")},
        "uwer_parts_trie_n100": {k: r3(s("trie")[k]) for k in ("uwer_subdel", "uwer_ins_near_biased", "uwer_ins_other")},
        "false_trigger_baseline": r3(s("baseline")["false_trigger_rate"]),
        "false_trigger_control": r3(s("trie_control")["false_trigger_rate"]),
        "false_trigger_trie": r3(s("trie")["false_trigger_rate"]),
        "false_trigger_soundalike_baseline": r3(s("baseline", "test_soundalike")["false_trigger_rate"]),
        "false_trigger_soundalike_control": r3(s("trie_control", "test_soundalike")["false_trigger_rate"]),
        "false_trigger_soundalike_trie": r3(s("trie", "test_soundalike")["false_trigger_rate"]),
        "recall_baseline_n100": r3(s("baseline")["recall"]),
        "recall_control_n100": r3(s("trie_control")["recall"]),
        "recall_trie_n100": r3(s("trie")["recall"]),
        "bwer_baseline_n10": r3(s("baseline", n=10)["bwer"]),
        "bwer_trie_n10": r3(s("trie", n=10)["bwer"]),
        "bwer_control_n10": r3(s("trie_control", n=10)["bwer"]),
        "bwer_baseline_n1000": r3(s("baseline", n=1000)["bwer"]),
        "bwer_trie_n1000": r3(s("trie", n=1000)["bwer"]),
        "bwer_control_n1000": r3(s("trie_control", n=1000)["bwer"]),
        "bwer_control_heldout_style_n100": r3(s("trie_control").get(f"bwer:{HELDOUT}")),
        "bwer_trie_heldout_style_n100": r3(s("trie").get(f"bwer:{HELDOUT}")),
        "recall_control_heldout_style_n100": r3(s("trie_control").get(f"recall:{HELDOUT}")),
        "recall_trie_heldout_style_n100": r3(s("trie").get(f"recall:{HELDOUT}")),
        "bwer_by_style_n100": {arm: {k[len("bwer:style:"):]: r3(v) for k, v in s(arm).items()
                                     if k.startswith("bwer:style:")} for arm in ("trie_control", "trie")},
        "bwer_by_class_n100": {arm: {k[len("bwer:"):]: r3(v) for k, v in s(arm).items()
                                     if k.startswith("bwer:") and not k.startswith("bwer:style:")}
                               for arm in ("trie_control", "trie")},
        "bwer_reduction_vs_control_seeds": reductions,
        "bwer_reduction_vs_control_sounds_like_seeds": sl_reductions,
        "bwer_reduction_heldout_style_sounds_like_seeds": heldout_reductions,
        "wer_delta_vs_control_n0_seeds": no_list_deltas,
        "cue_cost_ratio_5000_10": round(ratio, 3),
        "cue_ms_n10": round(small, 3),
        "cue_ms_n5000": round(large, 3),
        "recipe_s": round(recipe_s, 1),
        "recipe_parts_s": {"corpus": corpus_s, "training": round(trained["wall_seconds"], 1),
                           "evaluation": round(eval_s, 1), "repeat_check": round(check_s, 1)},
        "wer_baseline_n0": r3(s("baseline", "test", 0)["wer"]),
        "wer_control_n0": r3(s("trie_control", "test", 0)["wer"]),
        "wer_trie_n0": r3(s("trie", "test", 0)["wer"]),
        "wer_delta_vs_control_ci95_n0": [r3(wer0_ctl_ci["low"]), r3(wer0_ctl_ci["high"])],
        "familiar_recall_baseline_n0": r3(s("baseline", "test", 0).get("rare_recall:frequent")),
        "familiar_recall_control_n0": r3(s("trie_control", "test", 0).get("rare_recall:frequent")),
        "familiar_recall_trie_n0": r3(s("trie", "test", 0).get("rare_recall:frequent")),
        "wer_baseline_unseen_n0": r3(s("baseline", n=0)["wer"]),
        "wer_trie_unseen_n0": r3(s("trie", n=0)["wer"]),
        "recall_baseline_homophone_n100": r3(s("baseline", confusable=True)["recall"]),
        "recall_trie_homophone_n100": r3(s("trie", confusable=True)["recall"]),
        "false_trigger_trie_homophone_n100": r3(s("trie", confusable=True)["false_trigger_rate"]),
        "bwer_trie_homophone_n100": r3(s("trie", confusable=True)["bwer"]),
        "train_steps": {key: read_history(trained["arms"][key]["last_checkpoint"])["steps"] for key in arms},
        "train_seconds": {key: round(read_history(trained["arms"][key]["last_checkpoint"])["seconds"], 1)
                          for key in arms},
        "train_minutes": {key: round(read_history(trained["arms"][key]["last_checkpoint"])["seconds"] / 60, 2)
                          for key in arms},
        "same_seed_same_metrics": same,
        **beam_figures(),
        **sounds_like_figures(),
        **cue_only_figures(),
        "seeds": list(recipe.seeds),
        "bench_wall_s": round(time.perf_counter() - t_start, 1),
    }
    if len(seeds) > 1:
        import statistics

        for name, values in (("bwer_reduction_vs_control_seeds", reductions),
                             ("bwer_reduction_vs_control_sounds_like_seeds", sl_reductions),
                             ("bwer_reduction_heldout_style_sounds_like_seeds", heldout_reductions),
                             ("wer_delta_vs_control_n0_seeds", no_list_deltas)):
            if None not in values:
                out[f"{name}_mean"] = round(statistics.fmean(values), 4)
                out[f"{name}_sd"] = round(statistics.stdev(values), 4)
    return out
