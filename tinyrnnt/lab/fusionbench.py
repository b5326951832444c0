"""The `fusion` benchmark: beam search and shallow-fusion boosting, alone and on the trie-biased model.

Models: the trie recipe's baseline, trie arm and its equal-steps control
(trained by the `trie` benchmark's code, or read back when already trained with
the same settings). The boost weight is tuned on the valid split (lowest WER),
separately for each model it is applied to, and the chosen weight is used on
test; for the trie arm together with the weight of its own token boost while
fusing (MODEL_SCALES). Arms on the unseen-name test split at N in {10, 100, 1000}: beam
baseline, beam control, beam + fusion (on the baseline and on the control),
beam trie, beam trie + fusion (and the control and trie arms again with lists that
carry sounds-like spellings, tinyrnnt.bias.soundslike); plus after-trigger fusion, the sound-alike false
triggers, the real-time factor of beam 4 with trie cue and boosting at N = 1000
on one thread, and our beam search against torchaudio's RNNTBeamSearch on the
same plain model, beam and utterances (WER and time, side by side).

The trie arm decodes as its recipe says: with `decode.spotting` (keyword spotting
steers its mixing boost, tinyrnnt.bias.spotting) in its tuning, its test arms and
its real-time factor (also measured without spotting, beside); the baseline and
control have no boost to steer.
"""

from __future__ import annotations

import json
import sys
import time
from pathlib import Path

from tinyrnnt.lab.evaluate import evaluate, save_results, write_atomic
from tinyrnnt.lab.triebench import SOUNDS_LIKE  # sounds-like spellings per entry, chosen on valid

# The trie arm's own token boost while fusing, tuned on valid with the weight (decode.model_boost_scale):
# at full strength with fusion the arm over-boosts (valid, N = 100, beam 4, 2026-12-03 14:27, spotting
# with no boost where no heard entry is open: best WER at scale 1 0.063 (weight 0.5), at scale 0.5
# 0.056 (weight 1); before that rule 0.080 at scale 1 and 0.058 at scale 0).
MODEL_SCALES = (0.0, 0.25, 0.5, 1.0)

HELDOUT = "style:reed"
# Trigger phrases of the built-in scenario, per entity class (read off its templates: the
# words that come right before a slot). Our notation: phrases separated by "|".
TRIGGERS = {
    "invented_name": "call | message | text | ring | ask | tell | find | saw | for | to | at | from | leave | "
                     "left | of | on",
    "compound": "the",
    "rare_word": "the | of | more",
}


def _log(msg: str) -> None:
    print(msg, file=sys.stderr, flush=True)


def run_fusion_bench(args) -> dict:
    import torch

    from tinyrnnt.bias.fusion import parse_triggers
    from tinyrnnt.bias.spotting import can_spot
    from tinyrnnt.data import CorpusSplit, loader
    from tinyrnnt.decode.beam import beam_search
    from tinyrnnt.decode.reference import reference_beam_search
    from tinyrnnt.lab.fusion import DEFAULT_WEIGHTS, sweep_boost, write_curve
    from tinyrnnt.lab.train import load_model
    from tinyrnnt.lab.triebench import train_recipe
    from tinyrnnt.score import compare_systems
    from tinyrnnt.text import decode

    t_start = time.perf_counter()
    _, arms, trained, _ = train_recipe(args)
    out_dir = Path(args.run_dir) / "fusion"
    models = {key: load_model(trained["arms"][key]["last_checkpoint"])[0] for key in ("baseline", "trie_control", "trie")}
    torch.set_num_threads(2)
    corpus, limit, beam = args.corpus, (args.limit or None), 4
    spot = bool(arms["trie"].cfg.decode.spotting and can_spot(models["trie"]))  # the trie recipe's decoding
    spotting = {"baseline": False, "trie_control": False, "trie": spot}
    triggers = parse_triggers(TRIGGERS)

    # 1. the boost weight, tuned on valid for each model it is applied to
    weights = DEFAULT_WEIGHTS if not args.quick else (0.0, 1.0, 2.0, 4.0)
    chosen, scale_of, curves = {}, {}, {}
    tunings = [(key, where, 0) for key in models
               for where in (("anywhere", "after_trigger") if key == "baseline" else ("anywhere",))]
    tunings += [("trie_control", "anywhere", SOUNDS_LIKE), ("trie", "anywhere", SOUNDS_LIKE)]
    for key, where, sl in tunings:
        # the sound-alike false triggers are read off the baseline's curves (reported, not tuned on)
        sweep = sweep_boost(models[key], corpus, weights, list_size=100, beam=beam, where=where,
                            triggers=TRIGGERS if where == "after_trigger" else None, limit=limit,
                            soundalike="test_soundalike" if key == "baseline" else None, label=f"{key} {where}",
                            sounds_like=sl, model_scales=(MODEL_SCALES if not args.quick else (0.0, 1.0))
                            if key == "trie" else (1.0,), spotting=spotting[key])
        name = f"boost_curve_{key}_{where}" + (f"_sounds_like{sl}" if sl else "")
        write_curve(out_dir, name, sweep)
        chosen[(key, where, sl)], curves[name] = sweep["chosen"], sweep["rows"]
        scale_of[(key, where, sl)] = sweep["chosen_model_scale"]
        _log(f"{name}: chosen boost weight {sweep['chosen']:g}, model boost x{sweep['chosen_model_scale']:g} "
             f"on valid; curve in {out_dir / name}.png")

    # 2. the arms on the unseen-name test split
    arm_plan = {  # name: (model, boost where or None, sounds-like spellings per entry)
        "beam_baseline": ("baseline", None, 0), "beam_control": ("trie_control", None, 0),
        "fusion": ("baseline", "anywhere", 0), "fusion_trigger": ("baseline", "after_trigger", 0),
        "control_fusion": ("trie_control", "anywhere", 0), "beam_trie": ("trie", None, 0),
        "trie_fusion": ("trie", "anywhere", 0),
        # lists that also carry sounds-like spellings (tinyrnnt.bias.soundslike), both models alike
        "beam_control_sounds_like": ("trie_control", None, SOUNDS_LIKE),
        "control_fusion_sounds_like": ("trie_control", "anywhere", SOUNDS_LIKE),
        "beam_trie_sounds_like": ("trie", None, SOUNDS_LIKE),
        "trie_fusion_sounds_like": ("trie", "anywhere", SOUNDS_LIKE),
    }
    results: dict[tuple, tuple] = {}
    test = CorpusSplit(corpus, "test_unseen")
    alike = CorpusSplit(corpus, "test_soundalike")
    t_eval = time.perf_counter()
    for arm, (key, where, sl) in arm_plan.items():
        boost = None
        if where is not None:
            boost = {"weight": chosen[(key, where, sl)], "where": where, "triggers": triggers,
                     "model_scale": scale_of[(key, where, sl)]}
            if boost["weight"] == 0:
                boost = None
        all_sizes = not args.quick and not sl and arm not in ("fusion_trigger", "control_fusion")
        for split, sizes in ((test, (10, 100, 1000) if all_sizes else (100,)), (alike, (100,))):
            for n in sizes:
                records, summary = evaluate(models[key], split, list_size=n, search="beam", beam=beam, boost=boost,
                                            limit=limit, sounds_like=sl, spotting=spotting[key])
                summary["chosen_boost_weight"] = boost["weight"] if boost else 0.0
                save_results(out_dir / arm, f"{split.split}.n{n}", records, summary)
                results[(arm, split.split, n)] = (records, summary)
                _log(f"{arm:15s} {split.split}.n{n:<5d} WER {summary['wer']:.3f} U-WER {summary['uwer'] or 0:.3f} "
                     f"B-WER {summary['bwer'] if summary['bwer'] is not None else float('nan'):.3f} "
                     f"false-trigger {summary['false_trigger_rate'] or 0:.3f}")
    eval_s = time.perf_counter() - t_eval

    def s(arm, n=100, split="test_unseen"):
        return results[(arm, split, n)][1]

    def counts(arm, n=100):
        return {r["id"]: r["counts"] for r in results[(arm, "test_unseen", n)][0]}

    def ci(a, b, rate="bwer", n=100):
        c = compare_systems(counts(a, n), counts(b, n), rate=rate)
        return [r4(c["low"]), r4(c["high"])]

    # 3. real-time factor: beam 4, trie cue and boosting at N = 1000, one thread
    torch.set_num_threads(1)
    rtf_limit = min(limit or 300, 300)
    boost = {"weight": chosen[("trie", "anywhere", 0)] or 1.0, "where": "anywhere", "triggers": triggers,
             "model_scale": scale_of[("trie", "anywhere", 0)]}
    _, rtf_summary = evaluate(models["trie"], test, list_size=1000, search="beam", beam=beam, boost=boost,
                              limit=rtf_limit, spotting=spot)
    rtf = rtf_summary["rtf"]
    _log(f"RTF beam 4 + trie + fusion at N=1000, one thread{' (spotting)' if rtf_summary['spotting'] else ''}: {rtf:.4f}")
    rtf_plain = None if not spot else rtf  # evaluate skips spotting where the pair turns the boost off
    if rtf_summary["spotting"]:  # beside: the same decoding without spotting
        rtf_plain = evaluate(models["trie"], test, list_size=1000, search="beam", beam=beam, boost=boost,
                             limit=rtf_limit)[1]["rtf"]
        _log(f"RTF beam 4 + trie + fusion at N=1000, one thread, without spotting: {rtf_plain:.4f}")

    # 4. against torchaudio's RNNTBeamSearch: plain baseline, same beam and utterances, one thread
    ref_split = CorpusSplit(corpus, "test")
    n_ref = min(args.reference_utts, len(ref_split.items))
    model = models["baseline"]
    refs, ours_h, theirs_h, ours_s, theirs_s = [], [], [], 0.0, 0.0
    for batch in loader(ref_split, 64):
        if len(refs) >= n_ref:
            break
        take = min(64, n_ref - len(refs))
        feats, lens = batch["feats"][:take], batch["feat_lens"][:take]
        t0 = time.perf_counter()
        ours = beam_search(model, feats, lens, beam=beam)
        ours_s += time.perf_counter() - t0
        t0 = time.perf_counter()
        theirs = reference_beam_search(model, feats, lens, beam=beam)
        theirs_s += time.perf_counter() - t0
        refs += batch["texts"][:take]
        ours_h += [decode(n[0][0]) if n else "" for n in ours]
        theirs_h += [decode(t) for t in theirs]
    wer_ours, wer_theirs = corpus_wer(refs, ours_h), corpus_wer(refs, theirs_h)
    same_hyp = sum(a == b for a, b in zip(ours_h, theirs_h)) / max(len(refs), 1)
    _log(f"ours vs torchaudio RNNTBeamSearch on {len(refs)} utterances: WER {wer_ours:.4f} vs {wer_theirs:.4f}, "
         f"{ours_s:.1f} s vs {theirs_s:.1f} s, same 1-best {same_hyp:.3f}")
    torch.set_num_threads(2)

    def turns(rows, key):
        """Does `key` rise past the chosen weight (the trade-off), by at least 0.002?"""
        vals = [(r["weight"], r[key]) for r in rows if r.get(key) is not None]
        best_w = min(vals, key=lambda v: v[1])[0] if vals else None
        after = [v for w, v in vals if best_w is not None and w > best_w]
        return bool(after) and max(after) > min(v for _, v in vals) + 0.002

    base_curve = curves["boost_curve_baseline_anywhere"]

    def sounds_like_figures() -> dict:
        """The same comparisons with lists that carry sounds-like spellings (both models alike)."""
        sl = "_sounds_like"
        held = {arm: s(arm + sl).get(f"bwer:{HELDOUT}") for arm in ("beam_control", "control_fusion", "beam_trie",
                                                                     "trie_fusion")}
        out = {"sounds_like_spellings": SOUNDS_LIKE}
        for arm in ("beam_control", "control_fusion", "beam_trie", "trie_fusion"):
            out[f"bwer_{arm}{sl}_n100"] = r4(s(arm + sl)["bwer"])
            out[f"uwer_{arm}{sl}_n100"] = r4(s(arm + sl)["uwer"])
            out[f"bwer_{arm}_heldout_style{sl}_n100"] = r4(held[arm])
            out[f"recall_{arm}_heldout_style{sl}_n100"] = r4(s(arm + sl).get(f"recall:{HELDOUT}"))
            out[f"false_trigger_soundalike_{arm}{sl}"] = r4(s(arm + sl, 100, "test_soundalike")["false_trigger_rate"])
        out.update({
            f"trie_fusion_bwer_delta_vs_trie{sl}_ci95_n100": ci("beam_trie" + sl, "trie_fusion" + sl),
            f"trie_fusion_bwer_delta_vs_control_fusion{sl}_ci95_n100": ci("control_fusion" + sl, "trie_fusion" + sl),
            f"trie_fusion_uwer_delta_vs_control{sl}_ci95_n100": ci("beam_control" + sl, "trie_fusion" + sl, "uwer"),
            f"heldout_trie_fusion_reduction_vs_control{sl}": r4(1 - held["trie_fusion"] / held["beam_control"])
            if held["beam_control"] else None,
        })
        return out
    out = {
        "bwer_beam_baseline_n100": r4(s("beam_baseline")["bwer"]),
        "bwer_beam_control_n100": r4(s("beam_control")["bwer"]),
        "bwer_fusion_n100": r4(s("fusion")["bwer"]),
        "bwer_fusion_trigger_n100": r4(s("fusion_trigger")["bwer"]),
        "bwer_control_fusion_n100": r4(s("control_fusion")["bwer"]),
        "bwer_trie_n100": r4(s("beam_trie")["bwer"]),
        "bwer_trie_fusion_n100": r4(s("trie_fusion")["bwer"]),
        "uwer_beam_baseline_n100": r4(s("beam_baseline")["uwer"]),
        "uwer_beam_control_n100": r4(s("beam_control")["uwer"]),
        "uwer_fusion_n100": r4(s("fusion")["uwer"]),
        "uwer_trie_n100": r4(s("beam_trie")["uwer"]),
        "uwer_trie_fusion_n100": r4(s("trie_fusion")["uwer"]),
        "wer_beam_baseline_n100": r4(s("beam_baseline")["wer"]),
        "wer_trie_fusion_n100": r4(s("trie_fusion")["wer"]),
        "fusion_bwer_reduction_vs_beam_baseline_n100": r4(1 - s("fusion")["bwer"] / s("beam_baseline")["bwer"]),
        "fusion_bwer_delta_ci95_n100": ci("beam_baseline", "fusion"),
        "trie_fusion_bwer_delta_vs_trie_ci95_n100": ci("beam_trie", "trie_fusion"),
        "trie_fusion_bwer_delta_vs_control_fusion_ci95_n100": ci("control_fusion", "trie_fusion"),
        "trie_fusion_bwer_delta_vs_control_ci95_n100": ci("beam_control", "trie_fusion"),
        "trie_fusion_uwer_delta_vs_control_ci95_n100": ci("beam_control", "trie_fusion", "uwer"),
        "bwer_beam_control_heldout_style_n100": r4(s("beam_control").get(f"bwer:{HELDOUT}")),
        "bwer_fusion_heldout_style_n100": r4(s("fusion").get(f"bwer:{HELDOUT}")),
        "bwer_trie_heldout_style_n100": r4(s("beam_trie").get(f"bwer:{HELDOUT}")),
        "bwer_trie_fusion_heldout_style_n100": r4(s("trie_fusion").get(f"bwer:{HELDOUT}")),
        "heldout_trie_fusion_reduction_vs_control": r4(
            1 - s("trie_fusion")[f"bwer:{HELDOUT}"] / s("beam_control")[f"bwer:{HELDOUT}"])
        if s("beam_control").get(f"bwer:{HELDOUT}") else None,
        "false_trigger_soundalike": {arm: r4(s(arm, 100, "test_soundalike")["false_trigger_rate"]) for arm in arm_plan},
        "chosen_boost_weight": chosen[("baseline", "anywhere", 0)],
        "chosen_boost_weights": {f"{k}.{w}" + (f".sounds_like{sl}" if sl else ""): v for (k, w, sl), v in chosen.items()},
        "chosen_model_boost_scales": {f"{k}.{w}" + (f".sounds_like{sl}" if sl else ""): v
                                      for (k, w, sl), v in scale_of.items() if k == "trie"},
        **sounds_like_figures(),
        "boost_curve_baseline": base_curve,
        "curve_turns_uwer": turns(base_curve, "uwer"),
        "curve_turns_soundalike_false_triggers": turns(base_curve, "soundalike_false_trigger_rate"),
        "rtf_beam4_trie_fusion_n1000": round(rtf, 5),
        "rtf_beam4_trie_fusion_no_spotting_n1000": None if rtf_plain is None else round(rtf_plain, 5),
        "trie_spotting": spot,
        "rtf_utterances": rtf_summary["n_utts"],
        "speedup_vs_torchaudio_beam": round(theirs_s / max(ours_s, 1e-9), 2),
        "seconds_ours_vs_torchaudio": [round(ours_s, 2), round(theirs_s, 2)],
        "wer_ours_vs_torchaudio_beam": [r4(wer_ours), r4(wer_theirs)],
        "wer_diff_vs_torchaudio_beam": r4(abs(wer_ours - wer_theirs)),
        "same_1best_share_vs_torchaudio": r4(same_hyp),
        "reference_utterances": len(refs),
        "evaluation_s": round(eval_s, 1),
        "bench_wall_s": round(time.perf_counter() - t_start, 1),
    }
    for n in ((10, 1000) if not args.quick else ()):
        for arm in ("beam_baseline", "beam_control", "fusion", "beam_trie", "trie_fusion"):
            out[f"bwer_{arm}_n{n}"] = r4(s(arm, n)["bwer"])
    write_atomic(out_dir / "fusion_bench.json", json.dumps(out, indent=1) + "\n")
    return out


def corpus_wer(refs: list[str], hyps: list[str]) -> float:
    """Word errors over reference words, summed over utterances."""
    from tinyrnnt.score import edit_counts

    totals = [edit_counts(r.split(), h.split()) for r, h in zip(refs, hyps)]
    return sum(s + d + i for s, d, i, _ in totals) / max(sum(n for *_, n in totals), 1)


def r4(v):
    return None if v is None else round(float(v), 4)
