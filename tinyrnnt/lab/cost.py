"""What each biasing method costs as lists grow: training step, decoding per utterance, memory.

Methods: "none" (the plain model, greedy), "trie" (trie cue, greedy),
"attention" and "trie+attention" (greedy), "shallow_fusion" (the plain model,
beam 4 with the boosting scorer at weight 1; it trains nothing, so its
training step is the plain model's, measured again in its own process).
Each method is measured in a process of its own (spawned, one thread), so its
peak memory is its own: the peak resident size after the largest list size,
and how far that is above the size right after loading the model.

Lists: utterance i of the unseen-name test split gets its corpus list (its
rare words, then distractors) up to the corpus's largest size, then invented
words up to N; every utterance has its own list, so per-list work (building
the prefix tree, encoding the phrases, building the automaton) is in every
utterance's time. Times are medians after an untimed warm-up: of DECODE_PASSES passes over the
timed utterances (each pass's mean per utterance) for decoding, of the repeats for a training step.
"""

from __future__ import annotations

import json
import resource
import statistics
import time
from pathlib import Path

from tinyrnnt.runtime import peak_rss_mb

METHODS = {  # method -> (arm whose checkpoint it uses, search)
    "none": ("baseline", "greedy"),
    "trie": ("trie", "greedy"),
    "attention": ("attention", "greedy"),
    "trie+attention": ("trie_attention", "greedy"),
    "shallow_fusion": ("baseline", "fusion"),
}
# passes over the timed utterances at each size; the median pass is reported (one pass's mean moved
# between 25 and 42 ms per utterance from one pass to the next on the 2-core machine)
DECODE_PASSES = 3
BEAM, BOOST = 4, 1.0  # shallow fusion's settings here (beam 4, weight 1: the tuned weight of the fusion benchmark)


def timing_list(split, i: int, n: int) -> list[str]:
    """Utterance i's corpus list up to the corpus's largest size, then invented words up to n."""
    import numpy as np

    from tinyrnnt.bias.trie import invented_words

    words = split.biasing_list(i, min(n, largest_list(split)))
    seen, rng = set(words), np.random.default_rng(1000 + i)
    while len(words) < n:
        for w in invented_words(2 * (n - len(words)), rng, 5, 12):
            if w not in seen and len(words) < n:
                seen.add(w)
                words.append(w)
    return words


def largest_list(split) -> int:
    """The largest list size the split's corpus lists hold (distractor columns of its list array)."""
    from tinyrnnt.data import _load_array

    return int(_load_array(split.folder / f"{split.split}.lists.npy").shape[1])


def _rss_mb() -> float:
    return int(Path("/proc/self/statm").read_text().split()[1]) * resource.getpagesize() / 2 ** 20


def _decode_one(model, method: str, batch) -> None:
    from tinyrnnt.decode.beam import beam_search
    from tinyrnnt.decode.greedy import greedy_decode

    if METHODS[method][1] == "fusion":
        beam_search(model, batch["feats"], batch["feat_lens"], batch["lists"], beam=BEAM,
                    boost={"weight": BOOST, "where": "anywhere"})
        return
    biaser = model.bias.decoder(batch["lists"]) if model.bias is not None else None
    greedy_decode(model, batch["feats"], batch["feat_lens"], biaser=biaser)


def measure_method(method: str, checkpoint: str, corpus: str, sizes: tuple[int, ...], utterances: int,
                   train_batch: int, train_repeats: int) -> dict:
    """One method's times at every size (run in its own process)."""
    import torch

    from tinyrnnt.data import CorpusSplit, collate
    from tinyrnnt.lab.train import load_model

    torch.set_num_threads(1)
    model = load_model(checkpoint)[0]
    loaded_mb = _rss_mb()
    split = CorpusSplit(corpus, "test_unseen")
    hop = split.card["features"]["hop_ms"] / 1000.0
    timed = list(range(2, 2 + utterances))
    warm = [0, 1]
    decode_ms, train_ms, audio_s = {}, {}, sum(len(split[i]["feats"]) * hop for i in timed)
    params = [p for p in model.parameters() if p.requires_grad]
    optimiser = torch.optim.Adam(params, lr=1e-5)
    # every timed utterance once, untimed, before any size is measured. The first size still runs
    # slower for the plain model (42.6 against 21-29 ms per utterance, though it reads no list);
    # the cause is not known (README, "What the benchmarks measured")
    model.eval()
    with torch.no_grad():
        for i in timed:
            _decode_one(model, method, collate([{**split[i], "list": timing_list(split, i, min(sizes))}]))
    for n in sorted(sizes):
        def batch_of(ids):
            return collate([{**split[i], "list": timing_list(split, i, n)} for i in ids])

        model.eval()
        with torch.no_grad():
            for i in warm:
                _decode_one(model, method, batch_of([i]))
            batches = [batch_of([i]) for i in timed]  # lists built before the clock starts: reading lists is not decoding
            passes = []
            for _ in range(DECODE_PASSES):
                spent = 0.0
                for b in batches:
                    t0 = time.perf_counter()
                    _decode_one(model, method, b)
                    spent += time.perf_counter() - t0
                passes.append(spent / len(batches))
        decode_ms[str(n)] = round(1000 * statistics.median(passes), 2)
        model.train()
        b = batch_of(timed[:train_batch])
        steps = []
        for k in range(train_repeats + 1):  # the first is the warm-up
            t0 = time.perf_counter()
            optimiser.zero_grad()
            lists = b["lists"] if model.bias is not None else None
            loss = model.losses(b["feats"], b["feat_lens"], b["targets"], b["target_lens"], lists)["loss"]
            loss.backward()
            optimiser.step()
            if k:
                steps.append(time.perf_counter() - t0)
        train_ms[str(n)] = round(1000 * statistics.median(steps), 1)
    peak_mb = peak_rss_mb()
    return {"decode_ms": decode_ms, "train_ms": train_ms, "audio_s": audio_s,
            "rtf": {n: round(ms / 1000 * len(timed) / audio_s, 4) for n, ms in decode_ms.items()},
            "peak_mb": round(peak_mb, 1), "loaded_mb": round(loaded_mb, 1)}


def measure_costs(checkpoints: dict[str, str], corpus: str, sizes: tuple[int, ...], utterances: int = 20,
                  train_batch: int = 8, train_repeats: int = 3, quiet: bool = True) -> dict:
    """Every method, each in its own spawned process, one after another."""
    import multiprocessing as mp
    import sys
    from concurrent.futures import ProcessPoolExecutor

    out = {"decode_ms_per_utt": {}, "train_step_ms": {}, "rtf": {}, "peak_memory_mb": {}, "settings": {
        "sizes": list(sizes), "utterances": utterances, "train_batch": train_batch, "train_repeats": train_repeats,
        "decode_passes": DECODE_PASSES,
        "threads": 1, "split": "test_unseen", "shallow_fusion": {"beam": BEAM, "weight": BOOST},
        "peak_memory": "peak resident size of the method's own process after the largest size; "
                       "above_loaded = that minus the size after loading the model"}}
    ctx = mp.get_context("spawn")
    for method, (arm, _) in METHODS.items():
        t0 = time.perf_counter()
        with ProcessPoolExecutor(max_workers=1, mp_context=ctx) as pool:
            r = pool.submit(measure_method, method, checkpoints[arm], corpus, tuple(sizes), utterances,
                            train_batch, train_repeats).result()
        out["decode_ms_per_utt"][method] = r["decode_ms"]
        out["train_step_ms"][method] = r["train_ms"]
        out["rtf"][method] = r["rtf"]
        out["peak_memory_mb"][method] = {"peak": r["peak_mb"], "above_loaded": round(r["peak_mb"] - r["loaded_mb"], 1),
                                         "at_list_size": max(sizes)}
        if not quiet:
            print(f"{method:16s} decode ms/utt {r['decode_ms']}  train step ms {r['train_ms']}  "
                  f"peak {r['peak_mb']:.0f} MB ({time.perf_counter() - t0:.0f} s)", file=sys.stderr, flush=True)
    return out


def write_cost_report(folder: str | Path, costs: dict) -> None:
    """cost.json, cost.md (one table per measure) and cost.png (time against N, log-log)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from tinyrnnt.lab.evaluate import write_atomic

    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    write_atomic(folder / "cost.json", json.dumps(costs, indent=1) + "\n")
    sizes = [str(n) for n in costs["settings"]["sizes"]]
    lines = []
    for key, title in (("decode_ms_per_utt", "decoding, ms per utterance (one thread)"),
                       ("train_step_ms", f"training step, ms (batch of {costs['settings']['train_batch']}, one thread)"),
                       ("rtf", "real-time factor of decoding")):
        lines += [f"### {title}", "", "| method | " + " | ".join(f"N = {n}" for n in sizes) + " |",
                  "| --- |" + " --- |" * len(sizes)]
        lines += [f"| {m} | " + " | ".join(f"{row.get(n, float('nan')):g}" for n in sizes) + " |"
                  for m, row in costs[key].items()]
        lines.append("")
    lines += [f"### peak memory at N = {max(costs['settings']['sizes'])}, MB", "", "| method | peak | above loaded model |",
              "| --- | --- | --- |"]
    lines += [f"| {m} | {v['peak']:g} | {v['above_loaded']:g} |" for m, v in costs["peak_memory_mb"].items()]
    write_atomic(folder / "cost.md", "\n".join(lines) + "\n")
    fig, axes = plt.subplots(1, 2, figsize=(11, 4.2))
    xs = [int(n) for n in sizes]
    for ax, key, label in ((axes[0], "decode_ms_per_utt", "decoding, ms per utterance"),
                           (axes[1], "train_step_ms", "training step, ms")):
        for m, row in costs[key].items():
            ax.plot(xs, [row[n] for n in sizes], marker="o", label=m)
        ax.set_xscale("log")
        ax.set_yscale("log")
        ax.set_xlabel("biasing list size N")
        ax.set_ylabel(label)
        ax.grid(True, which="both", alpha=0.3)
    axes[0].legend(fontsize=8)
    fig.suptitle("cost of each biasing method against list size (one thread)")
    fig.tight_layout()
    tmp = folder / ".cost.png.tmp.png"
    fig.savefig(tmp, dpi=110)
    plt.close(fig)
    tmp.replace(folder / "cost.png")
