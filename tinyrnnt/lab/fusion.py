"""Tuning the shallow-fusion boost weight on the valid split, and its curve (CSV and PNG).

The weight is chosen on valid by a stated objective (default: lowest WER; ties go
to the smaller weight) and then used unchanged on the test splits. The curve also
carries U-WER, B-WER and the false-trigger rate of the sound-alike split at each
weight, for reading the trade-off; those sound-alike figures are reported, never
used to choose.

A model with its own token boost (the trie cue's) can be tuned over pairs: the
boost weight and `model_scales`, the weight of the model's own boost while fusing
(decode.model_boost_scale); both push list words, and a model that already follows
its list is over-boosted by fusion at full strength.
"""

from __future__ import annotations

import csv
import io
import json
import sys
from pathlib import Path

from tinyrnnt.lab.evaluate import evaluate, write_atomic

OBJECTIVES = ("wer", "bwer", "uwer")
# Finer below 0.5: a model that already follows its list (the trie cue) is over-boosted by 0.5
# (trie arm of record, valid, N = 100, beam 4: WER 0.083 at 0, 0.080 at 0.2, 0.091 at 0.5).
DEFAULT_WEIGHTS = (0.0, 0.1, 0.2, 0.3, 0.5, 1.0, 2.0, 3.0, 4.0, 6.0)


def sweep_boost(model, corpus: str, weights=DEFAULT_WEIGHTS, split: str = "valid", list_size: int = 100,
                beam: int = 4, max_symbols: int = 4, where: str = "anywhere", triggers: dict | None = None,
                objective: str = "wer", limit: int | None = None, soundalike: str | None = "test_soundalike",
                label: str = "", sounds_like: int = 0, model_scales=(1.0,), spotting: bool = False) -> dict:
    """{"rows": one per (model scale, weight), "chosen": weight, "chosen_model_scale", "objective": ...};
    prints progress on stderr. Ties go to the smaller weight, then to the larger model scale."""
    from tinyrnnt.bias.fusion import check_weight, parse_triggers
    from tinyrnnt.config import ConfigError
    from tinyrnnt.data import CorpusSplit

    if objective not in OBJECTIVES:
        raise ConfigError(f"boost tuning objective must be one of {list(OBJECTIVES)}, got {objective!r}")
    weights = [check_weight(w, "boost weight grid") for w in weights]
    if not weights:
        raise ConfigError("boost weight grid is empty; give at least one weight")
    scales = [check_weight(s, "model boost scale grid") for s in model_scales]
    if not scales or min(scales) < 0:
        raise ConfigError(f"model boost scale grid must hold numbers >= 0, got {list(model_scales)}")
    parsed = parse_triggers(triggers or {})
    valid = CorpusSplit(corpus, split)
    alike = CorpusSplit(corpus, soundalike) if soundalike else None
    rows = []
    # weight 0 means no fusion at all, where the model's boost is never scaled: once per grid
    pairs = [(s, w) for s in sorted(scales, reverse=True) for w in weights if w != 0 or s == max(scales)]
    for i, (scale, w) in enumerate(pairs, 1):
        print(f"\r  boost weight {w:g}, model scale {scale:g} ({i}/{len(pairs)}) {label}", end="",
              file=sys.stderr, flush=True)
        boost = {"weight": w, "where": where, "triggers": parsed, "model_scale": scale} if w != 0 else None
        _, s = evaluate(model, valid, list_size=list_size, search="beam", beam=beam, max_symbols=max_symbols,
                        boost=boost, limit=limit, sounds_like=sounds_like, spotting=spotting)
        row = {"weight": w, "model_boost_scale": scale if w != 0 else 1.0, "wer": s["wer"], "uwer": s["uwer"],
               "bwer": s["bwer"], "recall": s["recall"], "precision": s["precision"],
               "false_trigger_rate": s["false_trigger_rate"]}
        if alike is not None:
            _, a = evaluate(model, alike, list_size=list_size, search="beam", beam=beam, max_symbols=max_symbols,
                            boost=boost, limit=limit, sounds_like=sounds_like, spotting=spotting)
            row["soundalike_false_trigger_rate"] = a["false_trigger_rate"]
            row["soundalike_wer"] = a["wer"]
        rows.append(row)
    print(file=sys.stderr)
    best = min(rows, key=lambda r: (r[objective] if r[objective] is not None else float("inf"), r["weight"],
                                    -r["model_boost_scale"]))
    return {"rows": rows, "chosen": best["weight"], "chosen_model_scale": best["model_boost_scale"],
            "objective": objective, "split": split,
            "list_size": list_size, "where": where, "sounds_like": sounds_like, "spotting": spotting}


def write_curve(folder: str | Path, name: str, sweep: dict) -> list[Path]:
    """NAME.csv, NAME.json and NAME.png (U-WER, B-WER and false triggers against the weight)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    folder = Path(folder)
    rows = sweep["rows"]
    buf = io.StringIO()
    w = csv.DictWriter(buf, fieldnames=list(rows[0]))
    w.writeheader()
    w.writerows(rows)
    write_atomic(folder / f"{name}.csv", buf.getvalue())
    write_atomic(folder / f"{name}.json", json.dumps(sweep, indent=1) + "\n")
    fig, ax = plt.subplots(figsize=(6, 4))
    scale = sweep.get("chosen_model_scale", 1.0)  # the curve at the chosen model scale (weight 0 included)
    rows = [r for r in rows if r.get("model_boost_scale", 1.0) == scale or r["weight"] == 0]
    x = [r["weight"] for r in rows]
    for key, text in (("uwer", f"U-WER ({sweep['split']})"), ("bwer", f"B-WER ({sweep['split']})"),
                      ("soundalike_false_trigger_rate", "false triggers (sound-alike)")):
        if key in rows[0]:
            ax.plot(x, [r[key] if r[key] is not None else float("nan") for r in rows], marker="o", label=text)
    ax.axvline(sweep["chosen"], color="grey", linestyle="--", label=f"chosen {sweep['chosen']:g} "
                                                                    f"(lowest {sweep['objective'].upper()})")
    ax.set_xlabel("boost weight")
    ax.set_ylabel("rate")
    more = f", model boost x{scale:g}" if len({r.get("model_boost_scale", 1.0) for r in sweep["rows"]}) > 1 else ""
    ax.set_title(f"{name}: shallow fusion at N = {sweep['list_size']}, {sweep['where']}{more}")
    ax.legend()
    fig.tight_layout()
    tmp = folder / f".{name}.png.tmp"
    fig.savefig(tmp, format="png", dpi=100)
    plt.close(fig)
    tmp.replace(folder / f"{name}.png")
    return [folder / f"{name}.{ext}" for ext in ("csv", "json", "png")]
