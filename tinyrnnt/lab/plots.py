"""The report's figures (matplotlib, Agg backend: no display needed), each written atomically as PNG.

Every function takes plain rows (dicts) already read from a results folder and
returns the path it wrote; none of them reads files or computes statistics.
"""

from __future__ import annotations

from pathlib import Path

RATE_LABELS = {"bwer": "B-WER (errors on biased words)", "uwer": "U-WER (errors on other words)"}


def _pyplot():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def save_png(fig, path: Path) -> Path:
    """Write a figure to a temporary name, then rename: never a half-written picture."""
    plt = _pyplot()
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(f".{path.name}.tmp")
    fig.savefig(tmp, format="png", dpi=90)
    plt.close(fig)
    tmp.replace(path)
    return path


def _nan(v):
    return float("nan") if v is None else v


def rates_against_list_size(points: list[dict], title: str, path: Path) -> Path:
    """B-WER and U-WER against list size N, one line per system, bars = 95 % interval.

    points: {"system", "list_size", "bwer", "bwer_low", "bwer_high", "uwer", ...}; the list-size
    axis is linear up to 10 and logarithmic above (N = 0 stays on the axis).
    """
    plt = _pyplot()
    fig, axes = plt.subplots(1, 2, figsize=(10, 4))
    systems = list(dict.fromkeys(p["system"] for p in points))
    for ax, rate in zip(axes, ("bwer", "uwer")):
        for k, system in enumerate(systems):
            mine = sorted((p for p in points if p["system"] == system and p[rate] is not None),
                          key=lambda p: p["list_size"])
            if not mine:
                continue
            x = [p["list_size"] * (1 + 0.04 * (k - (len(systems) - 1) / 2)) for p in mine]  # a little apart
            y = [p[rate] for p in mine]
            low = [max(p[rate] - _nan(p[f"{rate}_low"]), 0) for p in mine]
            high = [max(_nan(p[f"{rate}_high"]) - p[rate], 0) for p in mine]
            ax.errorbar(x, y, yerr=[low, high], marker="o", capsize=3, label=system)
        if not ax.lines:
            ax.text(0.5, 0.5, "no such words in this split", ha="center", va="center", transform=ax.transAxes)
        ax.set_xscale("symlog", linthresh=10)
        ax.set_xlabel("biasing list size N")
        ax.set_ylabel(RATE_LABELS[rate])
        ax.grid(alpha=0.3)
    for ax in axes:
        if ax.get_legend_handles_labels()[0]:
            ax.legend(fontsize=8)
            break
    fig.suptitle(title)
    fig.tight_layout()
    return save_png(fig, path)


def training_curves(curves: list[dict], path: Path) -> Path:
    """Loss and valid CER against the total optimiser steps behind the model, one line per run.

    curves: {"label", "offset" (steps of the run it started from), "rows": metrics.csv rows}.
    """
    plt = _pyplot()
    fig, axes = plt.subplots(1, 2, figsize=(10, 4))
    panels = ((axes[0], ("train_loss", "valid_loss"), "transducer loss"), (axes[1], ("valid_cer",), "valid CER"))
    for ax, keys, ylabel in panels:
        for c in curves:
            for key in keys:
                pts = [(int(r["step"]) + c["offset"], float(r[key])) for r in c["rows"]
                       if r.get(key) not in (None, "")]
                if pts:
                    style = "-" if key.startswith("train") else "o--"
                    where = "training batches" if key.startswith("train") else "valid"
                    ax.plot(*zip(*pts), style, label=f"{c['label']} ({where})" if len(keys) > 1 else c["label"])
        ax.set_xlabel("optimiser steps behind the model")
        ax.set_ylabel(ylabel)
        ax.grid(alpha=0.3)
        if ax.get_legend_handles_labels()[0]:
            ax.legend(fontsize=7)
    fig.tight_layout()
    return save_png(fig, path)


def boost_curves(curves: list[dict], variant: str, path: Path) -> Path:
    """B-WER and U-WER on the tuning split against the boost weight, one line per system; the chosen
    weight of each is ringed. curves: {"label", "sweep": what lab.fusion.sweep_boost returned}."""
    plt = _pyplot()
    fig, axes = plt.subplots(1, 2, figsize=(10, 4))
    for ax, rate in zip(axes, ("bwer", "uwer")):
        for c in curves:
            rows = c["sweep"]["rows"]
            x, y = [r["weight"] for r in rows], [_nan(r[rate]) for r in rows]
            (line,) = ax.plot(x, y, marker="o", label=c["label"])
            chosen = [r for r in rows if r["weight"] == c["sweep"]["chosen"]]
            if chosen and chosen[0][rate] is not None:
                ax.plot([chosen[0]["weight"]], [chosen[0][rate]], "o", markersize=13, fillstyle="none",
                        color=line.get_color())
        ax.set_xlabel("boost weight")
        ax.set_ylabel(RATE_LABELS[rate])
        ax.grid(alpha=0.3)
    axes[0].legend(fontsize=8)
    sweep = curves[0]["sweep"]
    fig.suptitle(f"{variant}: tuning on {sweep['split']} at N = {sweep['list_size']} "
                 f"(ringed: the weight chosen, lowest {sweep['objective'].upper()})")
    fig.tight_layout()
    return save_png(fig, path)



def cost_against_list_size(name: str, rows: list[dict], path: Path) -> Path | None:
    """Every numeric column of a cost table against its `list_size` column (None when it has none)."""
    def number(v):
        try:
            return float(v)
        except (TypeError, ValueError):
            return None

    if not rows or "list_size" not in rows[0]:
        return None
    keys = [k for k in rows[0] if k != "list_size" and all(number(r[k]) is not None for r in rows)]
    if not keys:
        return None
    plt = _pyplot()
    fig, ax = plt.subplots(figsize=(6, 4))
    ordered = sorted(rows, key=lambda r: number(r["list_size"]))
    for k in keys:
        ax.plot([number(r["list_size"]) for r in ordered], [number(r[k]) for r in ordered], marker="o", label=k)
    ax.set_xscale("symlog", linthresh=10)
    ax.set_xlabel("biasing list size N")
    ax.set_title(f"cost against list size ({name})")
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8)
    fig.tight_layout()
    return save_png(fig, path)
