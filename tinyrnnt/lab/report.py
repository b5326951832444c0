"""Render an experiment's results folder into a report: summary.md, CSV tables, PNG plots and one
self-contained HTML page (tinyrnnt.lab.page).

It reads what `tinyrnnt experiment` writes: results.json, comparisons.json and
seeds.json at the top; run folders (found by their trained.json) with
per-utterance hypotheses and scores under results/, Lightning's CSV logs, and
boost-weight curves (results/boost_curve.*.json); pictures (any PNG in a folder
named pictures) and cost tables (cost*.csv) where present. A section whose
inputs are absent is skipped and the page says so. Intervals come from the
paired bootstrap over utterances (score.paired_bootstrap, Bisani & Ney, ICASSP
2004); a rate's own interval resamples its errors against a system with none.
It trains, decodes and changes nothing in the folder it reads.
"""

from __future__ import annotations

import csv
import json
from dataclasses import dataclass
from pathlib import Path

from tinyrnnt import config as C
from tinyrnnt.lab.evaluate import load_results, write_atomic
from tinyrnnt.lab.tables import to_csv

REPORT_FOLDER = "report"  # default place of the report inside the results folder


@dataclass
class RunFolder:
    """One trained arm: its recipe run name, seed, folder and steps."""

    run: str
    seed: int
    path: Path
    steps: int  # this run's own optimiser steps
    total_steps: int  # steps behind its last checkpoint, through init_from


def _read_json(path: Path, what: str):
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except json.JSONDecodeError as err:
        raise C.ConfigError(f"{path}: {what} is not valid JSON (line {err.lineno}: {err.msg})") from None
    except OSError as err:
        raise C.ConfigError(f"{path}: cannot read {what}: {err.strerror}") from None


def read_folder(folder: str | Path, out: Path | None = None) -> dict:
    """Everything the report shows, read from a results folder; errors name the file."""
    folder = Path(folder)
    if (folder / "results.json").is_file():
        data = {"folder": folder, "results": _read_json(folder / "results.json", "the results table")}
        for name in ("comparisons", "seeds"):
            path = folder / f"{name}.json"
            data[name] = _read_json(path, f"the {name} table") if path.is_file() else None
    elif (folder / "grid.jsonl").is_file():
        data = grid_tables(folder)
    else:
        raise C.ConfigError(f"{folder}: no results.json or grid.jsonl here; expected a results folder written by "
                            "`tinyrnnt experiment` (results.json, comparisons.json and run folders, or a grid's "
                            "grid.jsonl)")
    skip = out.resolve() if out is not None else None
    inside = lambda p: skip is not None and skip in p.resolve().parents  # noqa: E731  (the report's own files)
    runs = []
    for marker in sorted(folder.rglob("trained.json")):
        if inside(marker):
            continue
        done = _read_json(marker, "a finished run's record")
        try:
            runs.append(RunFolder(done["config"]["name"], int(done["config"]["train"]["seed"]), marker.parent,
                                  int(done["result"]["steps"]), int(done["result"]["history"]["steps"])))
        except (KeyError, TypeError, ValueError):
            raise C.ConfigError(f"{marker}: expected config.name, config.train.seed, result.steps and "
                                "result.history.steps") from None
    data["runs"] = runs
    if "where" not in data:  # an experiment: each evaluation's files in its run folder
        by_key = {(r.run, r.seed): r for r in runs}
        data["where"] = {(w["run"], w["seed"], w["decoding"], w["split"], w["list_size"]):
                         (by_key[(w["run"], w["seed"])].path / "results",
                          result_name(w["decoding"], w["split"], w["list_size"]))
                         for w in data["results"] if (w["run"], w["seed"]) in by_key}
    data["boost"] = [(r, p, _read_json(p, "a boost-weight curve")) for r in runs
                     for p in sorted((r.path / "results").glob("boost_curve.*.json"))]
    data["pictures"] = [p for p in sorted(folder.rglob("*.png")) if p.parent.name == "pictures" and not inside(p)]
    data["costs"] = [p for p in sorted(folder.rglob("cost*.csv")) if not inside(p)]
    return data


def grid_tables(folder: Path) -> dict:
    """A grid's lines as the report's tables: a system is a cell's labels but list size and seed;
    comparisons are each cell against its reference cell (grid_comparisons.json)."""
    from tinyrnnt.lab.grid import slug, read_lines
    from tinyrnnt.lab.tables import TABLE_KEYS, seed_rows

    lines = read_lines(folder / "grid.jsonl")
    axes = [part.split("=", 1)[0] for part in lines[0]["cell"].split(",")] if lines else []
    system = lambda g: ", ".join(f"{a}={g[a]}" for a in axes if a not in ("list_size", "seed")) or "model"  # noqa: E731
    rows, where, names = [], {}, {}
    for g in lines:
        row = {"run": system(g), "seed": int(g.get("seed", 0)), "decoding": "grid", "split": g["split"],
               "list_size": int(g.get("list_size", 0)), "boost_weight": g.get("boost_weight"), "steps": g["steps"],
               "train_s": g["train_s"], **{k: g.get(k) for k in TABLE_KEYS}}
        rows.append(row)
        key = (row["run"], row["seed"], "grid", row["split"], row["list_size"])
        # the model's folder inside this one (the recorded run_dir may be relative to another directory)
        where[key], names[g["cell"]] = (folder / "grid" / slug(g["model"]) / "results", g["hyps"]), row
    cmp_path = folder / "grid_comparisons.json"
    comparisons = []
    for c in _read_json(cmp_path, "the grid comparisons") if cmp_path.is_file() else []:
        mine, theirs = names.get(c["cell"]), names.get(c["against"])
        if mine is not None and theirs is not None:
            comparisons.append({"system": mine["run"], "against": theirs["run"], "role": "reference",
                                "seed": mine["seed"], "decoding": "grid", "split": c["split"],
                                "list_size": mine["list_size"],
                                **{k: c[k] for k in ("metric", "steps", "against_steps", "value", "against_value",
                                                     "delta", "low", "high", "p_improvement", "verdict")}})
    return {"folder": folder, "results": rows, "comparisons": comparisons, "seeds": seed_rows(rows) or None,
            "where": where}


def result_name(decoding: str, split: str, n: int) -> str:
    """The file stem lab.tables gives one evaluation.

    >>> result_name("greedy", "test", 100), result_name("beam", "valid", 0)
    ('test.n100', 'beam.valid.n0')
    """
    return f"{split}.n{n}" if decoding == "greedy" else f"{decoding}.{split}.n{n}"


def loaded(data: dict, run: str, seed: int, decoding: str, split: str, n: int) -> tuple[list, dict] | None:
    """One evaluation's records and summary, or None when it is not on disk."""
    place = data["where"].get((run, seed, decoding, split, n))
    return None if place is None else load_results(*place)


def counts_of(data: dict, run: str, seed: int, decoding: str, split: str, n: int) -> dict | None:
    """Per-utterance error counts by utterance id, or None when that evaluation is not on disk."""
    kept = loaded(data, run, seed, decoding, split, n)
    return None if kept is None else {r["id"]: r["counts"] for r in kept[0]}


def rate_interval(counts: dict, rate: str, n_resamples: int = 1000) -> tuple[float | None, float | None]:
    """95 % bootstrap interval of one system's error rate (total errors / total words per resample).

    >>> from tinyrnnt.score import score_utterance
    >>> rate_interval({"a": score_utterance("x y", "x y"), "b": score_utterance("z", "z")}, "wer")
    (0.0, 0.0)
    """
    from tinyrnnt.score import RATE_KEYS, paired_bootstrap

    num, den = RATE_KEYS[rate]
    ids = sorted(counts)
    r = paired_bootstrap([0] * len(ids), [counts[i][num] for i in ids], [counts[i][den] for i in ids],
                         n_resamples=n_resamples)
    return r["low"], r["high"]


def rate_points(data: dict) -> list[dict]:
    """Rows of results.json with each B-WER and U-WER's own interval, from the run folders' hypotheses."""
    points = []
    for row in data["results"]:
        counts = counts_of(data, row["run"], row["seed"], row["decoding"], row["split"], row["list_size"])
        point = {k: row[k] for k in ("run", "seed", "decoding", "split", "list_size", "bwer", "uwer")}
        for rate in ("bwer", "uwer"):
            low, high = rate_interval(counts, rate) if counts and row[rate] is not None else (None, None)
            point.update({f"{rate}_low": low, f"{rate}_high": high})
        points.append(point)
    return points


def against_reference(data: dict, reference: str) -> list[dict]:
    """Every system against one chosen reference system (same seed, decoding, split and N): the
    paired-bootstrap difference in WER, U-WER and B-WER, interval and probability of improvement."""
    from tinyrnnt.lab.tables import COMPARED, verdict
    from tinyrnnt.score import compare_systems

    names = sorted({r["run"] for r in data["results"]})
    if reference not in names:
        raise C.ConfigError(f"--against {reference!r}: no such run in {data['folder']}; runs: {names}")
    rows = []
    for row in data["results"]:
        if row["run"] == reference:
            continue
        where = (row["decoding"], row["split"], row["list_size"])
        mine = counts_of(data, row["run"], row["seed"], *where)
        theirs = counts_of(data, reference, row["seed"], *where)
        if mine is None or theirs is None:
            continue
        for rate in COMPARED:
            cmp = compare_systems(theirs, mine, rate=rate)
            rows.append({"system": row["run"], "against": reference, "seed": row["seed"], "decoding": where[0],
                         "split": where[1], "list_size": where[2], "metric": rate, "value": cmp["rate_b"],
                         "against_value": cmp["rate_a"], "delta": cmp["delta"], "low": cmp["low"],
                         "high": cmp["high"], "p_improvement": cmp["p_improvement"], "verdict": verdict(cmp)})
    return rows


def class_rows(data: dict) -> list[dict]:
    """B-WER by rare-word class and name style for every evaluation, from the runs' scores files."""
    rows = []
    for row in data["results"]:
        kept = loaded(data, row["run"], row["seed"], row["decoding"], row["split"], row["list_size"])
        if kept is not None:
            parts = {k[len("bwer:"):]: v for k, v in kept[1].items() if k.startswith("bwer:") and v is not None}
            for part, value in sorted(parts.items()):
                rows.append({"run": row["run"], "seed": row["seed"], "decoding": row["decoding"], "split": row["split"],
                             "list_size": row["list_size"], "words": part, "bwer": value,
                             "biased_words": kept[1].get(f"n_biased_words:{part}")})
    return rows


def training_logs(data: dict) -> list[dict]:
    """Each run's Lightning CSV log rows (all versions, in order), offset by the steps it started on."""
    curves = []
    for r in data["runs"]:
        rows = []
        for log in sorted((r.path / "logs").glob("version_*/metrics.csv"), key=lambda p: int(p.parent.name[8:])):
            with log.open(encoding="utf-8", newline="") as f:
                rows += list(csv.DictReader(f))
        if rows:
            label = r.run + (f" seed {r.seed}" if len({x.seed for x in data["runs"]}) > 1 else "")
            curves.append({"label": label, "offset": r.total_steps - r.steps, "rows": rows})
    return curves


def make_report(folder: str | Path, out: str | Path | None = None, against: str | None = None) -> dict:
    """Write the report of one results folder; returns {"html", "markdown", "headline", "files"}."""
    from tinyrnnt.files import MB, check_output_folder
    from tinyrnnt.lab import page
    from tinyrnnt.lab import plots

    folder = Path(folder)
    out = Path(out) if out is not None else folder / REPORT_FOLDER
    data = read_folder(folder, out)
    check_output_folder(out, 20 * MB, "report folder")
    data["points"] = rate_points(data)
    data["against"] = against_reference(data, against) if against else None
    data["classes"] = class_rows(data)
    tables = {"rates_with_intervals": data["points"], "bwer_by_class": data["classes"],
              "headline": page.headline_rows(data)}
    if data["against"] is not None:
        tables[f"against_{against}"] = data["against"]
    files = []
    for name, rows in tables.items():
        if rows:
            write_atomic(out / f"{name}.csv", to_csv(rows))
            files.append(out / f"{name}.csv")
    figures = []  # (title, path, caption)
    several = len({q["seed"] for q in data["points"]}) > 1
    for decoding, split in dict.fromkeys((p["decoding"], p["split"]) for p in data["points"]):
        mine = [dict(p, system=p["run"] + (f" seed {p['seed']}" if several else ""))
                for p in data["points"] if (p["decoding"], p["split"]) == (decoding, split)]
        title = split if decoding == "grid" else f"{split}, {decoding} decoding"
        path = plots.rates_against_list_size(mine, title, out / f"rates.{decoding}.{split}.png")
        figures.append(("rates", path, f"B-WER and U-WER against list size on {title}; bars: "
                                       "95 % bootstrap interval of each rate over utterances"))
    curves = training_logs(data)
    if curves:
        figures.append(("training", plots.training_curves(curves, out / "training.png"),
                        "training loss and valid CER against the optimiser steps behind each model (a fine-tuned "
                        "run starts at the steps of the run it started from)"))
    for variant in dict.fromkeys(p.name.split(".")[1] for _, p, _ in data["boost"]):
        mine = [{"label": r.run + (f" seed {r.seed}" if len({x.seed for x in data["runs"]}) > 1 else ""), "sweep": s}
                for r, p, s in data["boost"] if p.name.split(".")[1] == variant]
        figures.append(("boost", plots.boost_curves(mine, variant, out / f"boost.{variant}.png"),
                        f"shallow fusion ({variant}): rates on the tuning split against the boost weight"))
    for cost in data["costs"]:
        path = plots.cost_against_list_size(cost.name, page.csv_rows(cost), out / f"{cost.stem}.png")
        if path is not None:
            figures.append(("costs", path, f"cost against list size, from {cost.relative_to(folder)}"))
    data["figures"] = figures
    files += [p for _, p, _ in figures]
    markdown = page.markdown(data, out)
    write_atomic(out / "summary.md", markdown)
    html = page.html(data)
    write_atomic(out / "report.html", html)
    return {"html": out / "report.html", "markdown": out / "summary.md", "files": files + [out / "summary.md"],
            "figures": [p for _, p, _ in figures],
            "headline": tables["headline"], "headline_text": page.headline_text(data)}
