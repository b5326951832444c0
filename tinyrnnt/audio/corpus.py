"""A folder of audio manifests -> a corpus folder in the synthetic corpus's on-disk format.

The corpus folder is the feature cache: every audio file is read once, here;
training, decoding and scoring read only the corpus folder (uint8 log-mel
shards, manifests, lists; layout in `tinyrnnt.synth.corpus`), so every recipe
and command works on recorded speech unchanged with `data.corpus=` pointing at
it, or at the manifest folder itself (the corpus folder is then made, and
remade when a manifest changes, in its `features/` subfolder:
`refresh_cache`). Normalisation is per corpus: the card's per-bin mean and deviation come
from this corpus's train split (all its splits when it has none).

Rare words and lists: a manifest folder may hold `inventory.tsv` (the columns
the synthetic corpus writes: index, word, class, slot, exposure, group, style,
phones); words it lacks, or all words when there is none, are labelled from
the manifests themselves: class and style from their spans ("unlabelled" when
not given), exposure from where they occur (frequent: three or more uses in
train spans; few_shot: one or two; unseen_test: spans outside train only;
distractor: lists only). A split whose lines give lists keeps them (entries
after the utterance's own rare words, in order); a split other than train
whose lines give spans but no lists gets `list_size` random distractors per
utterance, never its own words or their other spellings.
"""

from __future__ import annotations

import json
import os
import shutil
import sys
import time
from collections import Counter
from dataclasses import asdict, dataclass, field
from pathlib import Path

import numpy as np

from tinyrnnt.audio.features import AudioError, FeatureConfig, LogMel, read_audio
from tinyrnnt.audio.manifest import Line, ManifestError, read_manifest
from tinyrnnt.data import quantize_frames
from tinyrnnt.files import check_output_folder, put_in_place
from tinyrnnt.synth.scenario import RARE_CLASSES

NO_ENTRY = 65535  # uint16 list padding: no more entries (tinyrnnt.data skips it)
INVENTORY_COLUMNS = ("index", "word", "class", "slot", "exposure", "group", "style", "phones")


@dataclass
class AudioCorpusConfig:
    features: FeatureConfig = field(default_factory=FeatureConfig)
    feature_offset: float = -14.0  # uint8 storage as in the synthetic corpus: offset + step * byte
    feature_step: float = 0.1
    list_size: int = 1000  # random distractor lists for splits with spans but no lists
    skip_bad_lines: bool = False  # skip (and count) bad lines instead of stopping at the first
    seed: int = 0  # random distractor lists

    def __post_init__(self):
        from tinyrnnt.config import require

        require(self, "audio", positive=("feature_step",), at_least_zero=("list_size",))


def audio_corpus_config(settings=()) -> AudioCorpusConfig:
    from tinyrnnt import config as C

    return C.apply_overrides(AudioCorpusConfig(), list(settings))


def is_manifest_folder(path: str | Path) -> bool:
    """A folder of audio manifests (`<split>.jsonl` holding "audio" fields), not a corpus folder."""
    path = Path(path)
    if (path / "card.json").is_file() or not path.is_dir():
        return False
    first = next(iter(sorted(path.glob("*.jsonl"))), None)
    if first is None:
        return False
    with open(first, encoding="utf-8") as f:
        line = next((ln for ln in f if ln.strip()), "")
    return '"audio"' in line


def refresh_cache(manifests: str | Path, cfg: AudioCorpusConfig | None = None, quiet: bool = False) -> Path:
    """The corpus folder cached inside a manifest folder (`features/`), built when missing or
    older than a manifest; returns it."""
    from tinyrnnt.data import CACHE

    manifests = Path(manifests)
    cache = manifests / CACHE
    card = cache / "card.json"
    newest = max(p.stat().st_mtime for p in manifests.glob("*.jsonl"))
    if not card.is_file() or card.stat().st_mtime < newest:
        _progress(f"{manifests}: making the feature cache {cache}", quiet)
        build_audio_corpus(manifests, cache, cfg, overwrite=card.is_file(), quiet=quiet)
    return cache


def _progress(msg: str, quiet: bool) -> None:
    if not quiet:
        print(msg, file=sys.stderr, flush=True)


def build_audio_corpus(manifests: str | Path, out_dir: str | Path, cfg: AudioCorpusConfig | None = None,
                       overwrite: bool = False, quiet: bool = False) -> dict:
    """Read every `<split>.jsonl` of the folder `manifests`, write the corpus folder; returns its card."""
    from tinyrnnt.synth.corpus import CorpusExistsError

    cfg = cfg or AudioCorpusConfig()
    manifests, out_dir = Path(manifests), Path(out_dir)
    if not manifests.is_dir():
        raise ManifestError(f"{manifests}: not a folder of manifests (one <split>.jsonl per split)")
    paths = sorted(manifests.glob("*.jsonl"))
    if not paths:
        raise ManifestError(f"{manifests}: holds no manifests; expected one <split>.jsonl per split, "
                            "e.g. train.jsonl, valid.jsonl, test.jsonl")
    if out_dir.exists() and not (overwrite and (out_dir / "card.json").is_file()):
        raise CorpusExistsError(f"{out_dir} already exists; pass overwrite to replace a corpus folder")
    t0 = time.perf_counter()
    splits, skipped = {}, []
    for p in paths:
        splits[p.stem], bad = read_manifest(p, cfg.skip_bad_lines)
        skipped += bad
    inventory = _inventory(manifests, splits)
    check_output_folder(out_dir, 0, "corpus folder")
    out_dir.parent.mkdir(parents=True, exist_ok=True)
    tmp = out_dir.parent / f".{out_dir.name}.partial-{os.getpid()}"
    shutil.rmtree(tmp, ignore_errors=True)
    tmp.mkdir()
    try:
        logmel, stats, audio_s = LogMel(cfg.features), {}, 0.0
        for split, lines in splits.items():
            kept, stats[split], secs = _write_split(tmp, split, lines, cfg, logmel, skipped, quiet)
            audio_s += secs
            if not kept:
                raise ManifestError(f"{manifests / (split + '.jsonl')}: no usable lines left in split {split!r}")
            splits[split] = kept
        index = {row["word"]: i for i, row in enumerate(inventory)}
        rng = np.random.default_rng(cfg.seed)
        longest = {}
        for split, lines in splits.items():
            rows = _lists(split, lines, inventory, index, cfg.list_size, rng)
            if rows is not None:
                np.save(tmp / f"{split}.lists.npy", rows)
                # the longest list an utterance offers: its own rare words and the row's entries
                longest[split] = int(max(len({sp["word"] for sp in ln.spans}) + int((r != NO_ENTRY).sum())
                                         for ln, r in zip(lines, rows)))
        with open(tmp / "inventory.tsv", "w", encoding="utf-8") as f:
            f.write("\t".join(INVENTORY_COLUMNS) + "\n")
            for i, row in enumerate(inventory):
                f.write("\t".join(str(i) if c == "index" else str(row[c]) for c in INVENTORY_COLUMNS) + "\n")
        card = _card(manifests, cfg, splits, stats, inventory, skipped)
        for split, n in longest.items():  # what recipes check list sizes against
            card["splits"][split]["lists"] = {"max": n}
        card["size_mb"] = round(sum(p.stat().st_size for p in tmp.iterdir()) / 1e6, 1)
        seconds = round(time.perf_counter() - t0, 2)
        (tmp / "card.json").write_text(json.dumps(card, indent=1) + "\n", encoding="utf-8")
        (tmp / "build.json").write_text(json.dumps({"build_seconds": seconds, "audio_seconds": round(audio_s, 2)})
                                        + "\n", encoding="utf-8")
        (tmp / "audio.json").write_text(json.dumps({"manifests": str(manifests.resolve()), **asdict(cfg)}, indent=1)
                                        + "\n", encoding="utf-8")
        put_in_place(tmp, out_dir)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    if skipped:
        _progress(f"skipped {len(skipped)} bad lines, e.g. {skipped[0]}", quiet)
    card["build_seconds"] = seconds
    return card


def _write_split(tmp: Path, split: str, lines: list[Line], cfg: AudioCorpusConfig, logmel: LogMel,
                 skipped: list[str], quiet: bool):
    """Features of one split as uint8 shard + manifest; bad audio stops or is skipped."""
    shard, kept, rows = [], [], []
    M = cfg.features.n_mels
    total, total_sq, clipped, offset, secs = np.zeros(M), np.zeros(M), 0, 0, 0.0
    for line in lines:
        try:
            wave = read_audio(line.audio, cfg.features)
        except AudioError as err:
            if not cfg.skip_bad_lines:
                raise ManifestError(f"{line.where}: {err}") from None
            skipped.append(f"{line.where}: {err}")
            continue
        secs += len(wave) / cfg.features.sample_rate
        f = logmel(wave)
        q, n_clipped, deq = quantize_frames(f, cfg.feature_offset, cfg.feature_step)
        clipped += n_clipped
        total += deq.sum(0)
        total_sq += (deq ** 2).sum(0)
        shard.append(q)
        kept.append(line)
        rows.append({"id": line.id, "text": line.text, "frames": len(q), "offset": offset,
                     "speaker": line.speaker, "spans": line.spans, "audio": str(line.audio)})
        offset += len(q)
    np.save(tmp / f"{split}.feats.npy", np.concatenate(shard) if shard else np.zeros((0, M), np.uint8))
    with open(tmp / f"{split}.jsonl", "w", encoding="utf-8") as f:
        for row in rows:
            f.write(json.dumps(row) + "\n")
    _progress(f"{split}: {len(kept)} utterances, {secs / 3600:.2f} h of audio", quiet)
    return kept, {"frames": offset, "sum": total, "sum_sq": total_sq, "clipped": clipped, "seconds": secs}, secs


def _inventory(folder: Path, splits: dict[str, list[Line]]) -> list[dict]:
    """The manifest folder's inventory.tsv (if any) plus every span and list word it lacks."""
    rows: list[dict] = []
    path = folder / "inventory.tsv"
    if path.is_file():
        lines = path.read_text(encoding="utf-8").splitlines()
        head = tuple(lines[0].split("\t")) if lines else ()
        if head != INVENTORY_COLUMNS:
            raise ManifestError(f"{path}:1: expected the columns {' '.join(INVENTORY_COLUMNS)}, got {' '.join(head)}")
        for lineno, ln in enumerate(lines[1:], 2):
            cells = ln.split("\t")
            if len(cells) != len(INVENTORY_COLUMNS):
                raise ManifestError(f"{path}:{lineno}: expected {len(INVENTORY_COLUMNS)} tab-separated columns")
            rows.append(dict(zip(INVENTORY_COLUMNS, cells)))
    known = {r["word"] for r in rows}
    train_uses = Counter(sp["word"] for ln in splits.get("train", []) for sp in ln.spans)
    first_span: dict[str, dict] = {}
    for lines in splits.values():
        for ln in lines:
            for sp in ln.spans:
                first_span.setdefault(sp["word"], sp)
    listed = [w for lines in splits.values() for ln in lines for w in (ln.list or [])]
    for word in list(first_span) + listed:
        if word in known:
            continue
        known.add(word)
        sp = first_span.get(word, {})
        n = train_uses[word]
        exposure = sp.get("exposure") or ("frequent" if n >= 3 else "few_shot" if n else
                                          "unseen_test" if word in first_span else "distractor")
        rows.append({"word": word, "class": sp.get("class", "unlabelled"), "slot": "", "exposure": exposure,
                     "group": f"w{len(rows)}", "style": sp.get("style", ""), "phones": ""})
    return rows


def _lists(split, lines, inventory, index, list_size, rng) -> np.ndarray | None:
    """(utterances, width) uint16 entries after each utterance's own rare words, NO_ENTRY-padded."""
    if len(inventory) >= NO_ENTRY:
        raise ManifestError(f"{len(inventory)} distinct rare and list words; at most {NO_ENTRY - 1} fit")
    if any(ln.list is not None for ln in lines):
        rest = [[index[w] for w in dict.fromkeys(ln.list or []) if w not in {sp["word"] for sp in ln.spans}]
                for ln in lines]
    elif split != "train" and any(ln.spans for ln in lines) and list_size > 0:
        groups: dict[str, list[int]] = {}
        for i, row in enumerate(inventory):
            groups.setdefault(row["group"], []).append(i)
        rest = []
        for ln in lines:
            banned = {j for sp in ln.spans for j in groups[inventory[index[sp["word"]]]["group"]]}
            perm = rng.permutation(len(inventory))
            rest.append(perm[~np.isin(perm, list(banned))][:list_size].tolist())
    else:
        return None
    out = np.full((len(lines), max(max(map(len, rest)), 1)), NO_ENTRY, np.uint16)
    for u, r in enumerate(rest):
        out[u, : len(r)] = r
    return out


def _homophone_share(inventory: list[dict]) -> float | None:
    """As `synth.card.homophone_share`, from inventory rows; None when no row gives phones.

    >>> _homophone_share([{"word": "kal", "class": "invented_name", "exposure": "unseen_test", "phones": "K AE1 L"},
    ...                   {"word": "cal", "class": "invented_name", "exposure": "frequent", "phones": "K AE1 L"},
    ...                   {"word": "orm", "class": "invented_name", "exposure": "frequent", "phones": "AO1 R M"}])
    0.6667
    """
    spellings: dict[str, set] = {}
    for r in inventory:
        if r["phones"]:
            spellings.setdefault(r["phones"], set()).add(r["word"])
    names = [r for r in inventory if r["class"] == "invented_name" and r["exposure"] != "soundalike" and r["phones"]]
    if not names:
        return None
    return round(sum(len(spellings[r["phones"]]) >= 2 for r in names) / len(names), 4)


def _card(folder: Path, cfg: AudioCorpusConfig, splits, stats, inventory, skipped) -> dict:
    """The synthetic corpus card's fields that apply to recorded speech, plus what was skipped."""
    basis = [s for s in stats if s == "train"] or list(stats)
    n = max(sum(stats[s]["frames"] for s in basis), 1)
    mean = sum(stats[s]["sum"] for s in basis) / n
    std = np.sqrt(np.maximum(sum(stats[s]["sum_sq"] for s in basis) / n - mean ** 2, 1e-8))
    hop_s = cfg.features.hop_ms / 1000
    train_uses = Counter(sp["word"] for ln in splits.get("train", []) for sp in ln.spans)
    card = {
        "scenario": f"audio:{folder.name}", "seed": cfg.seed, "source": "audio manifests",
        "size_mb": 0.0,
        "features": {"mels": cfg.features.n_mels, "hop_ms": cfg.features.hop_ms, "dtype": "uint8",
                     "offset": cfg.feature_offset, "step": cfg.feature_step, "normalised_on": basis,
                     "mean": [round(float(x), 4) for x in mean], "std": [round(float(x), 4) for x in std]},
        "inventory": {
            "rare_words": len(inventory),
            "invented_names": sum(r["class"] == "invented_name" for r in inventory),
            "name_homophone_share": _homophone_share(inventory),
            "by_class_and_exposure": dict(sorted(Counter(f"{r['class']}/{r['exposure']}" for r in inventory).items())),
            "name_styles": {}, "heldout_name_styles": [],
            "few_shot_train_uses": dict(sorted(Counter(
                train_uses[r["word"]] for r in inventory if r["exposure"] == "few_shot").items())),
        },
        "splits": {},
        "skipped_lines": len(skipped),
        "skipped": skipped[:50],
    }
    for split, lines in splits.items():
        words = sum(len(ln.text.split()) for ln in lines)
        per_class = Counter(sp.get("class", "unlabelled") for ln in lines for sp in ln.spans)
        card["splits"][split] = {
            "utterances": len(lines), "hours": round(stats[split]["seconds"] / 3600, 4),
            "mean_seconds": round(stats[split]["frames"] * hop_s / max(len(lines), 1), 2), "words": words,
            "clipped_share": round(stats[split]["clipped"] / max(stats[split]["frames"] * cfg.features.n_mels, 1), 5),
            "utterances_without_rare_words": sum(not ln.spans for ln in lines),
            "rare_word_rate": {c: round(per_class[c] / max(words, 1), 4) for c in (*RARE_CLASSES, "unlabelled")},
        }
    card["train_common_vocabulary"] = len({w for ln in splits.get("train", []) for w in ln.text.split()})
    return card
