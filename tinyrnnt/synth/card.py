"""The corpus card: what a corpus holds, as JSON and as a printed table."""

from __future__ import annotations

from collections import Counter, defaultdict
from pathlib import Path

from tinyrnnt.synth.scenario import RARE_CLASSES


def homophone_share(inventory) -> float:
    """Share of invented names whose phone string has two or more spellings in the inventory
    (sound-alike entries, which share their sound with a common word instead, left out)."""
    by_phones = defaultdict(set)
    for rw in inventory:
        by_phones[rw.phones].add(rw.word)
    names = [rw for rw in inventory if rw.cls == "invented_name" and rw.exposure != "soundalike"]
    if not names:
        return 0.0
    return sum(len(by_phones[rw.phones]) >= 2 for rw in names) / len(names)


def make_card(cfg, scn, inventory, splits, stats, list_stats, folder: Path) -> dict:
    """Everything here is a function of the config and seed (no timings), so cards compare byte for byte."""
    hop_s = cfg.acoustics.hop_ms / 1000.0
    exposure = Counter((rw.cls, rw.exposure) for rw in inventory)
    train_counts = Counter(sp["word"] for s in splits["train"] for sp in s.spans)
    card = {
        "scenario": scn.name,
        "seed": cfg.seed,
        "size_mb": round(sum(p.stat().st_size for p in folder.iterdir()) / 1e6, 1),
        "features": {"mels": cfg.acoustics.n_mels, "hop_ms": cfg.acoustics.hop_ms, "dtype": "uint8",
                     "offset": cfg.feature_offset, "step": cfg.feature_step,
                     "mean": [round(float(x), 4) for x in stats["train"]["mean"]],
                     "std": [round(float(x), 4) for x in stats["train"]["std"]]},
        "inventory": {
            "rare_words": len(inventory),
            "invented_names": sum(rw.cls == "invented_name" for rw in inventory),
            "name_homophone_share": round(homophone_share(inventory), 4),
            "by_class_and_exposure": {f"{c}/{e}": n for (c, e), n in sorted(exposure.items())},
            "name_styles": {sty: dict(sorted(Counter(rw.exposure for rw in inventory
                                                     if rw.cls == "invented_name" and rw.style == sty).items()))
                            for sty in sorted({rw.style for rw in inventory if rw.style})},
            "heldout_name_styles": list(cfg.text.heldout_styles),
            "few_shot_train_uses": dict(sorted(Counter(
                train_counts[rw.word] for rw in inventory if rw.exposure == "few_shot").items())),
        },
        "splits": {},
    }
    common = set()
    for split, sents in splits.items():
        words = sum(len(s.words) for s in sents)
        per_class = Counter(sp["class"] for s in sents for sp in s.spans)
        utts_with = Counter(c for s in sents for c in {sp["class"] for sp in s.spans})
        if split == "train":
            common = {w for s in sents for i, w in enumerate(s.words) if i not in {sp["index"] for sp in s.spans}}
        st = stats[split]
        card["splits"][split] = {
            "utterances": len(sents),
            "hours": round(st["frames"] * hop_s / 3600, 3),
            "mean_seconds": round(st["frames"] * hop_s / max(len(sents), 1), 2),
            "words": words,
            "clipped_share": round(st["clipped_values"] / max(st["frames"] * cfg.acoustics.n_mels, 1), 5),
            "utterances_without_rare_words": sum(not s.spans for s in sents),
            "rare_word_rate": {c: round(per_class[c] / max(words, 1), 4) for c in RARE_CLASSES},
            "utterance_share_with_class": {c: round(utts_with[c] / max(len(sents), 1), 4) for c in RARE_CLASSES},
            "exposures": dict(Counter(sp["exposure"] for s in sents for sp in s.spans)),
            "name_styles": dict(sorted(Counter(sp["style"] for s in sents for sp in s.spans if sp["style"]).items())),
        }
        if split in list_stats:
            card["splits"][split]["lists"] = {"sizes": list(cfg.list_sizes), "max": cfg.max_list_size,
                                              **list_stats[split]}
    card["train_common_vocabulary"] = len(common)
    if scn.user_entities:
        card["user_words"] = user_words(scn, inventory, splits)
    return card


def user_words(scn, inventory, splits) -> dict:
    """The role each word of the scenario's entities file was dealt (familiar, few-shot, unseen
    (valid), unseen (test), list-only), its slot, and how often each split says it."""
    from tinyrnnt.synth.sentences import ROLE

    mine = {w for words in scn.user_entities.values() for w in words}
    uses = Counter((split, sp["word"]) for split, sents in splits.items() for s in sents for sp in s.spans)
    return {rw.word: {"slot": rw.slot, "role": ROLE[rw.exposure],
                      "uses": {split: uses[(split, rw.word)] for split in splits if uses[(split, rw.word)]}}
            for rw in inventory if rw.word in mine}


def format_card(card: dict) -> str:
    """A plain text table of the card's main figures."""
    rows = [("split", "utts", "hours", "sec/utt", "no-rare", "name rate", "rare-word rate", "compound rate")]
    for split, s in card["splits"].items():
        r = s["rare_word_rate"]
        rows.append((split, str(s["utterances"]), f"{s['hours']:.2f}", f"{s['mean_seconds']:.2f}",
                     str(s["utterances_without_rare_words"]), f"{r['invented_name']:.3f}",
                     f"{r['rare_word']:.3f}", f"{r['compound']:.3f}"))
    widths = [max(len(row[i]) for row in rows) for i in range(len(rows[0]))]
    lines = ["  ".join(c.rjust(w) for c, w in zip(row, widths)) for row in rows]
    inv = card["inventory"]
    lines += [
        "",
        f"scenario {card['scenario']}  seed {card['seed']}  size {card['size_mb']} MB"
        + (f"  built in {card['build_seconds']} s" if "build_seconds" in card else ""),
        f"rare words {inv['rare_words']} (invented names {inv['invented_names']}, "
        f"share sharing their sound with another spelling {_share(inv['name_homophone_share'])})",
        f"training common vocabulary {card['train_common_vocabulary']} words; "
        f"few-shot uses in training {inv['few_shot_train_uses']}",
        "inventory by class/exposure: " + ", ".join(f"{k} {v}" for k, v in inv["by_class_and_exposure"].items()),
    ]
    if inv["name_styles"]:  # a scenario whose names all come from the user's file has none
        lines.append("name styles (spellings by exposure): " + "; ".join(
            f"{sty}{' (held out of training)' if sty in inv['heldout_name_styles'] else ''}: "
            + ", ".join(f"{e} {n}" for e, n in counts.items()) for sty, counts in inv["name_styles"].items()))
    if card.get("user_words"):
        lines.append(user_words_line(card["user_words"]))
    return "\n".join(lines)


def _share(x) -> str:
    """A share for the printed card; corpora made from audio may not know it (None)."""
    return "unknown" if x is None else f"{x:.3f}"


def user_words_line(words: dict) -> str:
    """The card's line of user words by role.

    >>> user_words_line({"tovrel": {"role": "list-only"}, "dovrin": {"role": "familiar"}})
    'your words (entities file) by role: familiar: dovrin; list-only: tovrel'
    """
    by_role: dict[str, list[str]] = defaultdict(list)
    for word, info in words.items():
        by_role[info["role"]].append(word)
    return "your words (entities file) by role: " + "; ".join(
        f"{role}: {', '.join(sorted(ws))}" for role, ws in sorted(by_role.items()))
