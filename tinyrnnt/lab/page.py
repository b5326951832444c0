"""The report's words and pages: the headline, summary.md and one self-contained HTML file.

The HTML page has no external references: styles are inline in the page and
every image is a data URI (base64 PNG), so it opens from disk in any browser
with no server and no network. Labels are plain English (LABELS).
"""

from __future__ import annotations

import base64
import html as H
import os
from pathlib import Path

LABELS = {"run": "system", "system": "system", "seed": "training seed", "decoding": "decoding", "split": "split",
          "list_size": "list size N", "boost_weight": "boost weight", "steps": "training steps",
          "train_s": "training seconds", "wer": "WER", "cer": "CER", "uwer": "U-WER",
          "uwer_subdel": "U-WER: substitutions and deletions",
          "uwer_ins_near_biased": "U-WER: insertions next to a biased error", "bwer": "B-WER",
          "recall": "biased-word recall", "precision": "biased-word precision",
          "false_trigger_rate": "false triggers", "rare_recall:unseen": "recall of unseen rare words",
          "against": "against", "role": "measured against", "metric": "rate", "against_steps": "their steps",
          "value": "system's rate", "against_value": "their rate", "delta": "difference", "low": "interval low",
          "high": "interval high", "p_improvement": "probability of improvement", "verdict": "in words",
          "seeds": "seeds", "words": "words of", "biased_words": "biased words",
          "bwer_low": "B-WER low", "bwer_high": "B-WER high", "uwer_low": "U-WER low", "uwer_high": "U-WER high"}
ROLES = {"control": "its equal-steps control", "start": "the run it started from",
         "reference": "the grid's reference cell"}
RATES = {"wer": "WER", "uwer": "U-WER", "bwer": "B-WER"}


def label(key: str) -> str:
    """The plain-English column label of a table key (the key itself when there is none).

    >>> label("bwer"), label("list_size"), label("wer_mean")
    ('B-WER', 'list size N', 'WER mean')
    """
    if key in LABELS:
        return LABELS[key]
    stem, _, tail = key.rpartition("_")
    if tail in ("mean", "sd") and stem in LABELS:
        return f"{LABELS[stem]} {'mean' if tail == 'mean' else 'spread (sd)'}"
    return key


def fmt(v) -> str:
    """A cell: rates to three decimals, missing values as a dash.

    >>> fmt(0.12345), fmt(None), fmt(100), fmt("control")
    ('0.123', '-', '100', 'its equal-steps control')
    """
    if v is None:
        return "-"
    if isinstance(v, float):
        return f"{v:.3f}"
    return ROLES.get(v, str(v)) if isinstance(v, str) else str(v)


def headline_rows(data: dict) -> list[dict]:
    """B-WER of each biased arm against its equal-steps control (from comparisons.json; in a grid,
    each cell against its reference cell); with no comparisons, every arm's WER, U-WER and B-WER."""
    cmp = [c for c in data["comparisons"] or [] if c["role"] in ("control", "reference") and c["metric"] == "bwer"]
    if cmp:
        keys = ("system", "against", "seed", "decoding", "split", "list_size", "steps", "against_steps", "value",
                "against_value", "delta", "low", "high", "p_improvement", "verdict")
        return [{k: c[k] for k in keys} for c in cmp if c["value"] is not None]  # N = 0: no biased words
    return [{k: r[k] for k in ("run", "seed", "decoding", "split", "list_size", "steps", "wer", "uwer", "bwer")}
            for r in data["results"]]


def headline_text(data: dict) -> list[str]:
    """One sentence per control comparison of B-WER (the held-out-name split first when present)."""
    rows = [r for r in headline_rows(data) if "verdict" in r]
    out = []
    for r in sorted(rows, key=lambda r: (r["split"] != "test_unseen", r["split"], r["decoding"], r["list_size"])):
        if r["delta"] is None or r["low"] is None:
            out.append(f"{r['system']} against {r['against']}, {r['split']}, N = {r['list_size']}, {r['decoding']}: "
                       "no biased words, no B-WER")
            continue
        steps = "equal steps" if r["steps"] == r["against_steps"] else "steps"
        decoding = "" if r["decoding"] == "grid" else f", {r['decoding']} decoding"  # a grid's system names it
        out.append(f"{r['system']} against {r['against']} ({steps}: {r['steps']:,} and {r['against_steps']:,}), "
                   f"{r['split']}, N = {r['list_size']}{decoding}, seed {r['seed']}: B-WER "
                   f"{r['value']:.3f} against {r['against_value']:.3f}, difference {r['delta']:+.3f} "
                   f"(95 % interval {r['low']:+.3f} to {r['high']:+.3f}): {r['verdict']}; probability of "
                   f"improvement {r['p_improvement']:.2f}")
    return out + seed_spread(rows)


def seed_spread(rows: list[dict]) -> list[str]:
    """With several training seeds: the mean difference over seeds and its spread (sample sd),
    beside the per-seed intervals (which cover test-set sampling only).

    >>> r = dict(system="trie", against="ctl", decoding="greedy", split="test", list_size=100, delta=-0.3)
    >>> print(seed_spread([dict(r, seed=0), dict(r, seed=1, delta=-0.2)])[0])
    trie against ctl, test, N = 100, greedy decoding, over 2 training seeds: mean B-WER difference -0.250, \
spread (sd) 0.071, 2 of 2 seeds lower
    """
    import statistics

    groups: dict[tuple, list[dict]] = {}
    for r in rows:
        if r.get("delta") is not None:
            groups.setdefault((r["system"], r["against"], r["decoding"], r["split"], r["list_size"]), []).append(r)
    out = []
    for (system, against, decoding, split, n), rs in groups.items():
        if len({r["seed"] for r in rs}) < 2:
            continue
        deltas = [r["delta"] for r in rs]
        how = "" if decoding == "grid" else f", {decoding} decoding"
        out.append(f"{system} against {against}, {split}, N = {n}{how}, over {len(rs)} training seeds: mean B-WER "
                   f"difference {statistics.fmean(deltas):+.3f}, spread (sd) {statistics.stdev(deltas):.3f}, "
                   f"{sum(d < 0 for d in deltas)} of {len(rs)} seeds lower")
    return out


def sections(data: dict) -> list[tuple[str, str, list[dict] | None, str | None]]:
    """(title, note, table rows or None, figure kind or None); a note alone says what is absent."""
    seeds_note = ("Mean and spread (sample standard deviation) over training seeds." if data["seeds"] else
                  "No spread over seeds: the recipe trained one seed (seeds.json absent).")
    cmp = data["comparisons"]
    out = [("Rates against list size", "B-WER and U-WER of each system at every list size, with the 95 % "
            "bootstrap interval of each rate over utterances.", None, "rates")]
    out += [("Results", "Every evaluation: rates and the training behind each model (steps and seconds summed "
                       "through the runs it started from).", data["results"], None),
           ("Differences against the grid's reference cells" if any(c["role"] == "reference" for c in cmp or [])
            else "Differences against the control and the starting run",
            "Paired bootstrap over utterances (1,000 resamples), 95 % interval of the system's rate minus the "
            "other's; a negative difference means fewer errors." if cmp else
            "No comparisons (comparisons.json absent or empty: no biased arm).", cmp or None, None)]
    out[1], out[2] = out[2], out[1]  # the differences before the full results table
    if data.get("against") is not None:
        out.append((f"Every system against {data['against'][0]['against'] if data['against'] else 'the reference'}",
                    "Paired bootstrap over utterances, same seed, decoding, split and N.", data["against"], None))
    out += [("Spread over training seeds", seeds_note, data["seeds"], None),
            ("Training curves", "From each run's training log." if any(f[0] == "training" for f in data["figures"])
             else "No training logs found in the run folders (logs/version_*/metrics.csv).", None, "training"),
            ("Boost-weight tuning", "The weight each system's shallow fusion used was chosen on the tuning split."
             if data["boost"] else "No boost-weight curves (no decoding with a tuned boost weight: "
             "results/boost_curve.*.json absent).", None, "boost"),
            ("B-WER by word class and name style", "From each evaluation's scores file."
             if data["classes"] else "No per-class scores found in the run folders.", data["classes"] or None, None),
            ("Pictures", "Pictures found in the results folder." if data["pictures"] else
             "No pictures in this results folder (no PNG in a folder named pictures).", None, "pictures"),
            ("Cost", "Cost tables found in the results folder." if data["costs"] else
             "No cost tables in this results folder (no cost*.csv).", None, "costs")]
    return out


def show(key: str, value) -> str:
    """A cell of column `key`: rate names in capitals, the rest as fmt.

    >>> show("metric", "bwer"), show("wer", 0.25)
    ('B-WER', '0.250')
    """
    return RATES.get(value, value) if key == "metric" else fmt(value)


SETTINGS = ("run", "system", "against", "role", "seed", "decoding", "split", "list_size", "steps", "against_steps",
            "boost_weight", "metric", "words")  # columns that say what a row is (not what it measured)


def split_constant(rows: list[dict]) -> tuple[list[str], str]:
    """Columns to show, and a sentence naming the setting columns that are the same in every row
    (shown once above the table instead of in every row).

    >>> split_constant([{"split": "test", "wer": 0.1}, {"split": "test", "wer": 0.2}])
    (['wer'], 'In every row: split test.')
    """
    same = [k for k in rows[0] if k in SETTINGS and len(rows) > 1 and len({str(r.get(k)) for r in rows}) == 1]
    keys = [k for k in rows[0] if k not in same]
    words = ", ".join(f"{label(k)} {fmt(rows[0][k])}" for k in same)
    return keys, (f"In every row: {words}." if same else "")


def _md_table(rows: list[dict]) -> str:
    keys, same = split_constant(rows)
    return "\n".join(([same, ""] if same else []) + ["| " + " | ".join(label(k) for k in keys) + " |",
                                                     "|" + "---|" * len(keys)]
                     + ["| " + " | ".join(show(k, r.get(k)) for k in keys) + " |" for r in rows])


def csv_rows(path: Path) -> list[dict]:
    import csv

    with path.open(encoding="utf-8", newline="") as f:
        return list(csv.DictReader(f))


def markdown(data: dict, out: Path) -> str:
    parts = [f"# Report of {data['folder']}", "", "## Headline", ""]
    parts += [f"- {s}" for s in headline_text(data)] or ["(no biased arm against a control)"]
    for title, note, rows, kind in sections(data):
        parts += ["", f"## {title}", "", note, ""]
        if rows:
            parts.append(_md_table(rows))
        for fkind, path, caption in data["figures"]:
            if fkind == kind:
                parts.append(f"![{caption}]({os.path.relpath(path, out)})")
        if kind == "pictures":
            parts += [f"![{p.name}]({os.path.relpath(p, out)})" for p in data["pictures"]]
        if kind == "costs":
            parts += [f"{p.name}:\n\n{_md_table(csv_rows(p))}\n" for p in data["costs"] if csv_rows(p)]
    return "\n".join(parts) + "\n"


STYLE = ("body{font-family:sans-serif;margin:2em;max-width:80em;color:#222}"
         "table{border-collapse:collapse;font-size:13px;margin:.5em 0;display:block;overflow-x:auto}"
         "td,th{border:1px solid #ccc;padding:2px 6px}"
         "th{background:#eee}td.lower{color:#060;font-weight:bold}td.higher{color:#a00;font-weight:bold}"
         "img{max-width:100%;border:1px solid #ddd}figure{margin:1em 0}figcaption{font-size:13px;color:#555}")


def _img(path: Path, caption: str) -> str:
    data = base64.b64encode(path.read_bytes()).decode("ascii")
    return (f'<figure><img alt="{H.escape(caption)}" src="data:image/png;base64,{data}">'
            f"<figcaption>{H.escape(caption)}</figcaption></figure>")


def _html_table(rows: list[dict]) -> str:
    keys, same = split_constant(rows)
    head = "".join(f"<th>{H.escape(label(k))}</th>" for k in keys)

    def cell(k, v):
        cls = ""
        if k == "verdict" and isinstance(v, str) and "excludes zero" in v:
            cls = ' class="lower"' if v.startswith("lower") else ' class="higher"'
        return f"<td{cls}>{H.escape(show(k, v))}</td>"

    body = "".join("<tr>" + "".join(cell(k, r.get(k)) for k in keys) + "</tr>" for r in rows)
    return (f"<p>{H.escape(same)}</p>" if same else "") + f"<table><tr>{head}</tr>{body}</table>"


def html(data: dict) -> str:
    title = f"Report of {data['folder']}"
    parts = [f"<!DOCTYPE html><html lang=\"en\"><head><meta charset=\"utf-8\"><title>{H.escape(title)}</title>"
             f"<style>{STYLE}</style></head><body><h1>{H.escape(title)}</h1><h2>Headline</h2><ul>"]
    parts += [f"<li>{H.escape(s)}</li>" for s in headline_text(data)] or ["<li>no biased arm against a control</li>"]
    parts.append("</ul>")
    for title, note, rows, kind in sections(data):
        parts.append(f"<h2>{H.escape(title)}</h2><p>{H.escape(note)}</p>")
        if rows:
            parts.append(_html_table(rows))
        parts += [_img(path, caption) for fkind, path, caption in data["figures"] if fkind == kind]
        if kind == "pictures":
            parts += [_img(p, str(p.relative_to(data["folder"]))) for p in data["pictures"]]
        if kind == "costs":
            parts += [f"<p>{H.escape(p.name)}</p>" + _html_table(csv_rows(p)) for p in data["costs"] if csv_rows(p)]
    parts.append("</body></html>\n")
    return "".join(parts)
