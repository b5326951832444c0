"""Reading corpora, batching by length, and the Lightning data module.

A corpus folder is what `tinyrnnt.synth.corpus` writes (see its docstring).
Features are stored as uint8 and come out here as float32, normalised with the
training split's per-bin mean and deviation from the corpus card.

Batches are dicts:
    feats (B, T, F) float32, feat_lens (B,), targets (B, U) long (padded with 0),
    target_lens (B,), ids, texts, and `lists` (per utterance a list of words) when
    the split carries biasing lists or a list sampler is set.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import torch

from tinyrnnt.text import encode


NO_LIST_ENTRY = 65535  # padding in a <split>.lists.npy row: no more entries


class CorpusError(ValueError):
    """A corpus folder is missing or damaged."""


@dataclass
class DataConfig:
    corpus: str = "corpora/default"  # corpus folder (built by `tinyrnnt corpus`)
    batch_size: int = 32
    bucket_batches: int = 20  # batches per length bucket: larger = less padding, less randomness
    valid_subset: int = 200  # valid utterances decoded during training (0 = all)
    eval_batch_size: int = 64

    def __post_init__(self):
        from tinyrnnt.config import require

        require(self, "data", positive=("batch_size", "bucket_batches", "eval_batch_size"),
                at_least_zero=("valid_subset",))


CACHE = "features"  # the corpus folder made inside a folder of audio manifests (tinyrnnt.audio.corpus)


def corpus_folder(path: str | Path) -> Path:
    """The corpus folder `path` names: itself, or for a folder of audio manifests, the corpus
    folder cached inside it.

    >>> str(corpus_folder("corpora/default"))
    'corpora/default'
    """
    path = Path(path)
    if not (path / "card.json").is_file() and (path / CACHE / "card.json").is_file():
        return path / CACHE
    return path


_VOCABULARIES: dict[tuple[str, int], set[str]] = {}  # (train.jsonl path, its mtime) -> its words


class CorpusSplit(torch.utils.data.Dataset):
    """One split of a corpus folder: manifest, memory-mapped frames, biasing lists."""

    def __init__(self, folder: str | Path, split: str, limit: int | None = None):
        folder = corpus_folder(folder)
        card_path = folder / "card.json"
        if not card_path.is_file():
            raise CorpusError(f"{folder}: no corpus here (card.json missing); build one with `tinyrnnt corpus`")
        self.folder, self.split = folder, split
        try:
            self.card = json.loads(card_path.read_text(encoding="utf-8"))
            self.card["features"]["offset"]
        except (json.JSONDecodeError, UnicodeDecodeError, KeyError, TypeError):
            raise CorpusError(f"{card_path}: the corpus card is damaged (not the JSON the corpus builder writes); "
                              "rebuild the corpus") from None
        manifest = folder / f"{split}.jsonl"
        if not manifest.is_file():
            raise CorpusError(f"{manifest}: split {split!r} not found; splits here: "
                              f"{sorted(p.stem for p in folder.glob('*.jsonl'))}")
        self.items = []
        with open(manifest, encoding="utf-8") as f:
            for lineno, line in enumerate(f, 1):
                try:
                    item = json.loads(line)
                    item["tokens"] = encode(item["text"], where=f"{manifest}:{lineno}")
                except (json.JSONDecodeError, KeyError) as err:
                    raise CorpusError(f"{manifest}:{lineno}: not a manifest line ({err})") from None
                if item["frames"] <= 0:
                    raise CorpusError(f"{manifest}:{lineno}: utterance {item.get('id')} has no frames")
                self.items.append(item)
                if limit is not None and len(self.items) >= limit:
                    break
        self.frames = _load_array(folder / f"{split}.feats.npy")
        end = self.items[-1]["offset"] + self.items[-1]["frames"] if self.items else 0
        if end > self.frames.shape[0]:
            raise CorpusError(f"{folder / (split + '.feats.npy')}: holds {self.frames.shape[0]} frames, "
                              f"the manifest needs {end}; rebuild the corpus")
        feat = self.card["features"]
        self.offset, self.step = float(feat["offset"]), float(feat["step"])
        self.mean = np.asarray(feat["mean"], dtype=np.float32)
        self.inv_std = 1.0 / np.asarray(feat["std"], dtype=np.float32)
        self._lists: dict[str, np.ndarray] = {}
        self._inventory: list[dict] | None = None
        self._labels: dict[str, tuple[str, ...]] | None = None
        self._vocabulary: set[str] | None = None

    def __len__(self) -> int:
        return len(self.items)

    def lengths(self) -> np.ndarray:
        return np.array([it["frames"] for it in self.items])

    def features(self, i: int) -> np.ndarray:
        it = self.items[i]
        q = self.frames[it["offset"]: it["offset"] + it["frames"]]
        return ((self.offset + self.step * q.astype(np.float32)) - self.mean) * self.inv_std  # (T, F)

    def __getitem__(self, i: int) -> dict:
        it = self.items[i]
        return {"id": it["id"], "text": it["text"], "feats": self.features(i), "tokens": it["tokens"],
                "spans": it["spans"], "index": i}

    def inventory(self) -> list[dict]:
        """Rows of inventory.tsv: index, word, class, slot, exposure, group, style, phones."""
        if self._inventory is None:
            path = self.folder / "inventory.tsv"
            lines = path.read_text(encoding="utf-8").splitlines()
            head = lines[0].split("\t")
            self._inventory = [dict(zip(head, ln.split("\t"))) for ln in lines[1:]]
        return self._inventory

    def word_labels(self) -> dict[str, tuple[str, ...]]:
        """Inventory word -> the labels scores are split by: its class, and "style:NAME" for an
        invented name (corpora built before name styles have no style column)."""
        if self._labels is None:
            self._labels = {row["word"]: (row["class"],) + ((f"style:{row['style']}",) if row.get("style") else ())
                            for row in self.inventory()}
        return self._labels

    def pronunciations(self) -> dict[str, str]:
        """Inventory word -> its ARPAbet phones ("" where the inventory has none)."""
        return {row["word"]: row.get("phones", "") for row in self.inventory()}

    def training_vocabulary(self) -> set[str]:
        """Every word of the corpus's training transcripts (train.jsonl; empty if it has none); read
        once per process and corpus folder (every split of a corpus, every evaluation, shares it)."""
        if self._vocabulary is None:
            path = self.folder / "train.jsonl"
            stamp = (str(path.resolve()), path.stat().st_mtime_ns if path.is_file() else 0)
            if stamp not in _VOCABULARIES:
                words: set[str] = set()
                if path.is_file():
                    with path.open(encoding="utf-8") as f:
                        for line in f:
                            if line.strip():
                                words.update(json.loads(line)["text"].split())
                _VOCABULARIES[stamp] = words
            self._vocabulary = _VOCABULARIES[stamp]
        return self._vocabulary

    def biasing_list(self, i: int, size: int, confusable: bool = False) -> list[str]:
        """The utterance's rare words, then distractors, `size` entries in all (nested across sizes)."""
        if size == 0:
            return []
        kind = "confusable" if confusable else "lists"
        if kind not in self._lists:
            path = self.folder / f"{self.split}.{kind}.npy"
            if not path.is_file():
                raise CorpusError(f"{path}: split {self.split!r} carries no biasing lists")
            self._lists[kind] = _load_array(path)
            if self._lists[kind].ndim != 2 or self._lists[kind].shape[0] < len(self.items):
                raise CorpusError(f"{path}: holds lists for {self._lists[kind].shape[0] if self._lists[kind].ndim else 0} "
                                  f"utterances, the split has {len(self.items)}; rebuild the corpus")
        rows = self._lists[kind]
        if size > rows.shape[1] + 3:
            raise CorpusError(f"list size {size} exceeds this corpus's largest lists ({rows.shape[1]})")
        own = list(dict.fromkeys(sp["word"] for sp in self.items[i]["spans"]))
        inv = self.inventory()
        # subtle: lists of recorded corpora differ in length; NO_LIST_ENTRY pads the shorter rows
        return own + [inv[int(j)]["word"] for j in rows[i][: max(size - len(own), 0)] if j != NO_LIST_ENTRY]


def quantize_frames(frames: np.ndarray, offset: float, step: float) -> tuple[np.ndarray, int, np.ndarray]:
    """Log-mel frames (T, F) as the uint8 bytes corpus folders store (value = offset + step * byte,
    CorpusSplit.features reads them back), how many values fell outside the byte range (clipped),
    and the values the bytes stand for, float64 (for the corpus's normalisation statistics).

    >>> q, clipped, deq = quantize_frames(np.array([[-1.0, 0.5, 300.0]]), 0.0, 1.0)
    >>> q.tolist(), clipped, deq.tolist()
    ([[0, 0, 255]], 2, [[0.0, 0.0, 255.0]])
    """
    q = np.round((frames - offset) / step)
    clipped = int(((q < 0) | (q > 255)).sum())
    q = np.clip(q, 0, 255).astype(np.uint8)
    return q, clipped, offset + step * q.astype(np.float64)


def _load_array(path: Path) -> np.ndarray:
    """A memory-mapped array file of a corpus; a missing, truncated or foreign file is a CorpusError."""
    if not path.is_file():
        raise CorpusError(f"{path}: missing from the corpus folder; rebuild the corpus")
    try:
        return np.load(path, mmap_mode="r")
    except (ValueError, OSError, EOFError) as err:
        raise CorpusError(f"{path}: damaged or truncated ({err}); rebuild the corpus") from None


def rank_and_world() -> tuple[int, int]:
    """(this process's rank, number of processes) of distributed training; (0, 1) without it."""
    dist = torch.distributed
    if dist.is_available() and dist.is_initialized():
        return dist.get_rank(), dist.get_world_size()
    return 0, 1


def shard(batches: list, rank: int, world: int) -> list:
    """This rank's share of an epoch's batches: every world-th batch from its rank on, after the
    list is topped up with its first batches to a multiple of the world size.

    >>> [shard([[0], [1], [2]], r, 2) for r in (0, 1)]  # both ranks take two steps
    [[[0], [2]], [[1], [0]]]
    """
    # subtle: all ranks must take the same number of steps (each step's gradient all-reduce waits
    # for every rank), so a short last round repeats batches instead of leaving a rank idle
    n = -(-len(batches) // world) * world
    return (batches + batches[: n - len(batches)])[rank::world]


class LengthBuckets(torch.utils.data.Sampler):
    """Batches of similar length: sort within random buckets, shuffle batch order.

    The batches of an epoch depend only on (seed, epoch), never on what was drawn before, so a
    resumed run picks up exactly where an interrupted one stopped (`start_at`). Under distributed
    training every process makes the same list and takes its own share (`shard`); batches done
    count per process.
    """

    def __init__(self, lengths: np.ndarray, batch_size: int, bucket_batches: int, shuffle: bool, seed: int = 0):
        self.lengths, self.batch_size, self.bucket = lengths, batch_size, batch_size * bucket_batches
        self.shuffle, self.seed = shuffle, seed
        self.epoch = 0  # the epoch the next iteration yields
        self.current_epoch = 0  # the epoch being yielded (items carry it to a transform)
        self._skip = 0  # batches of the next iteration already trained on

    def batches(self, epoch: int) -> list[list[int]]:
        """Every batch of an epoch, in order (a function of seed and epoch alone)."""
        rng = np.random.default_rng([self.seed, epoch])
        order = rng.permutation(len(self.lengths)) if self.shuffle else np.arange(len(self.lengths))
        batches = []
        for s in range(0, len(order), self.bucket):
            chunk = order[s: s + self.bucket]
            chunk = chunk[np.argsort(self.lengths[chunk], kind="stable")]
            batches += [chunk[k: k + self.batch_size].tolist() for k in range(0, len(chunk), self.batch_size)]
        if self.shuffle:
            batches = [batches[i] for i in rng.permutation(len(batches))]
        return batches

    def set_epoch(self, epoch: int) -> None:
        """Make the next iteration yield epoch `epoch` from its beginning (the trainer says which
        epoch starts; without it, each iteration is the next epoch)."""
        self.epoch, self._skip = epoch, 0

    def start_at(self, epoch: int, batches_done: int) -> None:
        """Make the next iteration yield epoch `epoch` without its first `batches_done` batches."""
        self.epoch, self._skip = epoch, batches_done

    def __iter__(self):
        self.current_epoch = self.epoch
        batches = shard(self.batches(self.epoch), *rank_and_world())[self._skip:]
        self.epoch, self._skip = self.epoch + 1, 0
        return iter(batches)

    def __len__(self) -> int:
        """Batches per epoch of this process. The trainer ends an epoch after this many, so it stays
        the count of full-size batches it always was (an epoch's last bucket remainders are not
        reached); under distributed training, each process's share of it."""
        full = (len(self.lengths) + self.batch_size - 1) // self.batch_size
        return -(-full // rank_and_world()[1])


def collate(items: list[dict]) -> dict:
    B = len(items)
    T = max(len(it["feats"]) for it in items)
    U = max(max(len(it["tokens"]) for it in items), 1)
    F = items[0]["feats"].shape[1]
    feats = np.zeros((B, T, F), dtype=np.float32)
    targets = torch.zeros(B, U, dtype=torch.long)
    for b, it in enumerate(items):
        feats[b, : len(it["feats"])] = it["feats"]
        targets[b, : len(it["tokens"])] = torch.as_tensor(it["tokens"])
    batch = {
        "feats": torch.from_numpy(feats),  # (B, T, F)
        "feat_lens": torch.tensor([len(it["feats"]) for it in items]),
        "targets": targets,  # (B, U)
        "target_lens": torch.tensor([len(it["tokens"]) for it in items]),
        "ids": [it["id"] for it in items],
        "texts": [it["text"] for it in items],
        "spans": [it["spans"] for it in items],
        "index": [it["index"] for it in items],
    }
    if "list" in items[0]:
        batch["lists"] = [it["list"] for it in items]
    return batch


def loader(split: CorpusSplit, batch_size: int, shuffle: bool = False, bucket_batches: int = 20,
           seed: int = 0, transform=None) -> torch.utils.data.DataLoader:
    """Batches of one split in the main process. A transform gets each item with its "epoch" added,
    so whatever it draws can depend on (epoch, utterance) alone."""
    sampler = LengthBuckets(split.lengths(), batch_size, bucket_batches, shuffle, seed)
    dataset = split if transform is None else _Mapped(split, transform, sampler)
    # subtle: a loader draws a base seed from the global torch generator each time it is iterated,
    # unless it has its own generator; with its own, iterating (a new epoch, a validation, a resumed
    # run) leaves the global stream that dropout draws from exactly as it was.
    return torch.utils.data.DataLoader(dataset, batch_sampler=sampler, collate_fn=collate, num_workers=0,
                                       generator=torch.Generator().manual_seed(seed))


class _Mapped(torch.utils.data.Dataset):
    def __init__(self, base, fn, sampler: LengthBuckets):
        self.base, self.fn, self.sampler = base, fn, sampler

    def __len__(self):
        return len(self.base)

    def __getitem__(self, i):
        return self.fn({**self.base[i], "epoch": self.sampler.current_epoch})
