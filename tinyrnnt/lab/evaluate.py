"""Decode a split with a trained model and score it; write hypotheses and totals."""

from __future__ import annotations

import json
import sys
import time
from pathlib import Path

import torch

from tinyrnnt.bias.soundslike import check_phones, corpus_key, corpus_spellings, expand_list, put_back
from tinyrnnt.data import CorpusError, CorpusSplit, loader
from tinyrnnt.decode.greedy import greedy_decode
from tinyrnnt.score import score_utterance, summarize
from tinyrnnt.text import decode


def write_atomic(path: str | Path, text: str) -> None:
    """Write to a temporary file beside `path`, then rename: never a half-written file."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(f".{path.name}.tmp")
    tmp.write_text(text, encoding="utf-8")
    tmp.replace(path)


def read_list_file(path: str | Path) -> list[str]:
    """A user's biasing list: one entry a line, '#' starts a comment; errors name the file and line."""
    return read_list_sections(path)[0]


def read_list_sections(path: str | Path) -> tuple[list[str], list[str | None], dict[str, str]]:
    """Entries, the class of each (None outside a section) and trigger phrases per class.

    The file: one entry a line; '#' starts a comment; a line "[class]" starts a class section and
    "[class] after: phrase | phrase" also gives the class's trigger phrases (after-trigger boosting).
    An entry may carry its pronunciation after "=", in ARPAbet phones ("szymiina = SH IH M IY N AH"),
    read by read_list_pronunciations (for sounds-like spellings).
    """
    return _parse_list(path)[:3]


def read_list_pronunciations(path: str | Path) -> dict[str, str]:
    """Entry -> the ARPAbet phones given after "=" on its line (entries without one are left out)."""
    return _parse_list(path)[3]


def _parse_list(path: str | Path):
    import re

    from tinyrnnt.text import check_text, normalize

    path = Path(path)
    if not path.is_file():
        raise CorpusError(f"{path}: biasing list file not found")
    entries, classes, triggers, phones, current = [], [], {}, {}, None
    for lineno, raw in enumerate(path.read_text(encoding="utf-8").splitlines(), 1):
        line = raw.split("#", 1)[0].strip()
        if line.startswith("["):
            m = re.fullmatch(r"\[\s*([A-Za-z0-9_]+)\s*\]\s*(?:after\s*:\s*(.*))?", line)
            if m is None:
                raise CorpusError(f"{path}:{lineno}: expected a class line '[class]' or "
                                  f"'[class] after: phrase | phrase', got {line!r}")
            current = m.group(1)
            if m.group(2) is not None:
                from tinyrnnt.bias.fusion import parse_triggers
                from tinyrnnt.config import ConfigError

                try:
                    parse_triggers({current: m.group(2)}, where=f"{path}:{lineno}")
                except ConfigError as err:
                    raise CorpusError(str(err)) from None
                triggers[current] = m.group(2)
            continue
        said = None
        if "=" in line:
            line, said = (part.strip() for part in line.split("=", 1))
            try:
                said = " ".join(check_phones(said))
            except ValueError as err:
                raise CorpusError(f"{path}:{lineno}: {err}") from None
            if not said:
                raise CorpusError(f"{path}:{lineno}: expected ARPAbet phones after '=', e.g. "
                                  f"'szymiina = SH IH M IY N AH'")
        entry = normalize(line)
        if entry:
            check_text(entry, f"{path}:{lineno}")
            if entry not in entries:
                entries.append(entry)
                classes.append(current)
            if said:
                phones[entry] = said
        elif said:
            raise CorpusError(f"{path}:{lineno}: a pronunciation with no entry before '='")
    if not entries:
        raise CorpusError(f"{path}: the biasing list is empty; expected one entry a line")
    return entries, classes, triggers, phones


def evaluate(model, split: CorpusSplit, list_size: int = 0, confusable: bool = False,
             batch_size: int = 64, max_symbols: int = 4, limit: int | None = None,
             fixed_list: list[str] | None = None, search: str = "greedy", beam: int = 4,
             boost: dict | None = None, fixed_classes: list[str | None] | None = None,
             progress: bool | str = False, sounds_like: int = 0,
             pronunciations: dict[str, str] | None = None, spotting: bool = False) -> tuple[list[dict], dict]:
    """Per-utterance records and the corpus summary (score.summarize keys, plus timing).

    fixed_list: one biasing list for every utterance (a user's own) instead of the corpus lists;
    fixed_classes: the entity class of each of its entries (after-trigger boosting).
    search: "greedy" or "beam" (records then carry "nbest": [[text, score], ...]); boost: shallow
    fusion for beam search (DecodeConfig.boost()), entry classes filled in from the corpus.
    progress: a bar with the time left on stderr (a string is its label; True: split and list size).
    sounds_like: add up to this many sounds-like spellings of each entry whose pronunciation the
    corpus inventory knows (tinyrnnt.bias.soundslike, the key learned from the corpus's training
    words), and write words decoded in one of them as the entry before scoring; 0: lists as they are. pronunciations: phones of a user's
    entries (read_list_pronunciations), over the inventory's. spotting: keyword spotting with the
    model's CTC head steers the trie's mixing boost (tinyrnnt.bias.spotting; greedy and beam).
    """
    from tinyrnnt.bias.spotting import spotting_decoder
    from tinyrnnt.decode.beam import beam_search

    model.eval()
    if search not in ("greedy", "beam"):
        raise ValueError(f"search must be 'greedy' or 'beam', got {search!r}")
    if boost is not None and search != "beam":
        raise ValueError("shallow fusion (boost) needs beam search")

    def attach(item):
        if fixed_list is not None:
            item["list"] = fixed_list
        else:
            item["list"] = split.biasing_list(item["index"], list_size, confusable) if list_size else []
        return item

    labels = split.word_labels()  # every inventory word -> its class (and name style)
    if boost is not None and boost.get("where") == "after_trigger":
        known = sorted({c for c in fixed_classes if c} if fixed_list is not None else {v[0] for v in labels.values()})
        unknown = sorted(set(boost.get("triggers", {})) - set(known))
        if unknown:
            raise CorpusError(f"decode.triggers: class {unknown[0]!r} is not a class of the biasing list's entries; "
                              f"known classes: {known}")
    if sounds_like:
        phones_of = {**split.pronunciations(), **(pronunciations or {})}
        vocabulary, key, spellings = split.training_vocabulary(), corpus_key(split), corpus_spellings(split)
    records, decode_s, audio_s = [], 0.0, 0.0
    total = min(limit, len(split.items)) if limit is not None else len(split.items)
    label = progress if isinstance(progress, str) else f"{split.split} N={list_size}"
    started = time.perf_counter()
    hop = split.card["features"]["hop_ms"] / 1000.0
    scale = float(boost.get("model_scale", 1.0)) if boost is not None else 1.0  # decode.model_boost_scale
    # spotting steers the model's token boost: with that boost scaled to 0 it changes nothing, costs the most
    spotting = spotting and scale != 0
    with torch.no_grad(), model.scaled_token_boost(scale):
        for batch in loader(split, batch_size, transform=attach):
            if limit is not None and len(records) >= limit:
                break
            t0 = time.perf_counter()
            nbest = None
            lists, written = batch["lists"], [{} for _ in batch["lists"]]
            if sounds_like:
                lists, written = map(list, zip(*(expand_list(lst, phones_of, vocabulary, key, sounds_like, spellings)
                                                 for lst in batch["lists"])))
            if search == "beam":
                b = None
                if boost is not None:
                    classes = ([list(fixed_classes) for _ in batch["lists"]] if fixed_list is not None else
                               [[labels.get(w, (None,))[0] for w in lst] for lst in batch["lists"]])
                    for k, (c, lst) in enumerate(zip(classes, batch["lists"])):  # a spelling: its entry's class
                        class_of = dict(zip(lst, c))
                        classes[k] = c + [class_of[written[k][w]] for w in lists[k][len(lst):]]
                    b = dict(boost, classes=classes)
                nbest = beam_search(model, batch["feats"], batch["feat_lens"], lists, beam=beam,
                                    max_symbols=max_symbols, boost=b, spotting=spotting)
                hyps = [n[0][0] if n else [] for n in nbest]
            else:
                # a biased model always decodes with its biaser (beam search builds its own per row);
                # at N = 0 the lists are empty
                biaser = (spotting_decoder(model, lists) if spotting
                          else model.bias.decoder(lists) if model.bias is not None else None)
                hyps = greedy_decode(model, batch["feats"], batch["feat_lens"], max_symbols=max_symbols,
                                     biaser=biaser)
            decode_s += time.perf_counter() - t0
            if progress:
                print("\r" + progress_bar(label, len(records) + len(hyps), total, time.perf_counter() - started),
                      end="", file=sys.stderr, flush=True)
            audio_s += float(batch["feat_lens"].sum()) * hop
            for k, h in enumerate(hyps):
                heard = decode(h)
                hyp = put_back(heard, written[k]) if sounds_like else heard
                spans = batch["spans"][k]
                counts = score_utterance(batch["texts"][k], hyp, batch["lists"][k], labels)
                records.append({"id": batch["ids"][k], "ref": batch["texts"][k], "hyp": hyp,
                                "list_size": list_size, "spans": spans, "counts": counts})
                if hyp != heard:
                    records[-1]["decoded_as"] = heard  # before sounds-like spellings were written as entries
                if nbest is not None:
                    records[-1]["nbest"] = [[put_back(decode(toks), written[k]), round(score, 4)]
                                            for toks, score in nbest[k]]
    if progress:
        print(file=sys.stderr)
    summary = summarize(r["counts"] for r in records)
    summary.update({"search": search, "beam": beam if search == "beam" else None, "spotting": spotting,
                    "boost_weight": boost["weight"] if boost else 0.0,
                    "boost_where": boost["where"] if boost else None,
                    "model_boost_scale": scale})
    summary.update({"list_size": list_size, "confusable": confusable, "sounds_like": sounds_like, "decode_seconds": round(decode_s, 3),
                    "audio_seconds": round(audio_s, 1), "rtf": decode_s / max(audio_s, 1e-9)})
    summary.update(exposure_recall(records))
    return records, summary


def progress_bar(label: str, done: int, total: int, elapsed: float, width: int = 24) -> str:
    """One line of progress: a bar, the count and the time left at the pace so far.

    >>> progress_bar("test N=100", 30, 120, 6.0, width=8)
    '  test N=100 [##......] 30/120 utterances, 6 s, about 18 s left'
    >>> progress_bar("test N=100", 120, 120, 24.4, width=8)
    '  test N=100 [########] 120/120 utterances, 24 s, done'
    """
    total = max(total, 1)
    filled = min(width, width * done // total)
    left = "done" if done >= total else f"about {elapsed / max(done, 1) * (total - done):.0f} s left"
    return f"  {label} [{'#' * filled}{'.' * (width - filled)}] {done}/{total} utterances, {elapsed:.0f} s, {left}"


def exposure_recall(records: list[dict], cls: str | None = None) -> dict:
    """Exact recall of rare words by exposure (frequent / few_shot / unseen), list or not.

    A reference rare word counts as recalled when the hypothesis holds it as a word
    at the aligned position (score.align); unlike biased-word recall this needs no
    list. With `cls`, only rare words of that class count.
    """
    from tinyrnnt.score import align

    hit, total = {}, {}
    for r in records:
        ref, hyp = r["ref"].split(), r["hyp"].split()
        matched = {i for op, i, _ in align(ref, hyp) if op == "C"}
        for sp in r["spans"]:
            if cls is not None and sp["class"] != cls:
                continue
            e = "unseen" if sp["exposure"].startswith("unseen") else sp["exposure"]
            total[e] = total.get(e, 0) + 1
            hit[e] = hit.get(e, 0) + (sp["index"] in matched)
    return {f"rare_recall:{e}": hit[e] / total[e] for e in sorted(total)}


RECORD_KEYS = ("id", "ref", "hyp", "list_size", "spans", "counts")


def save_results(out_dir: str | Path, name: str, records: list[dict], summary: dict) -> None:
    """NAME.hyps.jsonl (one utterance a line: id, ref, hyp, list size, rare-word spans, error counts)
    and NAME.scores.json (the totals); the hypotheses first, so scores never stand without them."""
    out_dir = Path(out_dir)
    write_atomic(out_dir / f"{name}.hyps.jsonl",
                 "".join(json.dumps({k: r[k] for k in RECORD_KEYS}) + "\n" for r in records))
    if records and "nbest" in records[0]:  # beam search: every kept hypothesis with its score
        write_atomic(out_dir / f"{name}.nbest.jsonl",
                     "".join(json.dumps({"id": r["id"], "nbest": r["nbest"]}) + "\n" for r in records))
    write_atomic(out_dir / f"{name}.scores.json", json.dumps(summary, indent=1) + "\n")


def load_results(out_dir: str | Path, name: str) -> tuple[list[dict], dict] | None:
    """What save_results wrote, or None when either file is missing or unreadable."""
    out_dir = Path(out_dir)
    try:
        summary = json.loads((out_dir / f"{name}.scores.json").read_text(encoding="utf-8"))
        lines = (out_dir / f"{name}.hyps.jsonl").read_text(encoding="utf-8").splitlines()
        records = [json.loads(line) for line in lines if line.strip()]
    except (OSError, json.JSONDecodeError):
        return None
    if len(records) != summary.get("n_utts") or not all(set(RECORD_KEYS) <= set(r) for r in records):
        return None
    return records, summary
