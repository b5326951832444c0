"""Audio manifests: JSON Lines, one utterance a line.

    {"audio": "wav/0001.wav", "text": "call maren oske", "speaker": "ana",
     "list": ["maren", "oske", "tollvik"], "spans": [{"word": "maren", "class": "invented_name"}, "oske"]}

`audio` is a path relative to the manifest's folder (or absolute); `text` the
transcript, in the token inventory after normalisation (`tinyrnnt.text`).
Optional: `id` (default: the file name and line), `speaker`, `list` (the
utterance's biasing list, in order), `spans` (its rare words: a word, or an
object with `word` and optionally `index`, the word's position in the text,
and its `class`, `exposure`, `style`). A folder of manifests holds one per
split, named after it: `train.jsonl`, `valid.jsonl`, `test.jsonl`, ...

Every problem is a ManifestError naming the file and line; `read_manifest`
either stops at the first or, when asked to skip bad lines, collects them.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path

from tinyrnnt.data import CorpusError
from tinyrnnt.text import TokenError, encode, normalize

KEYS = ("id", "audio", "text", "speaker", "list", "spans")
SPAN_KEYS = ("word", "index", "class", "exposure", "style")


class ManifestError(CorpusError):
    """A manifest line is malformed or names audio that cannot be used."""


@dataclass
class Line:
    where: str  # "manifest.jsonl:12", for messages
    id: str
    audio: Path
    text: str
    speaker: str
    list: list[str] | None  # None = the manifest gives none
    spans: list[dict] = field(default_factory=list)


def parse_line(raw: str, where: str, folder: Path) -> Line:
    """One manifest line -> Line; ManifestError naming `where` otherwise.

    >>> ln = parse_line('{"audio": "a.wav", "text": "Call  Maren", "spans": ["maren"]}', "m.jsonl:1", Path("d"))
    >>> ln.text, ln.spans, str(ln.audio)
    ('call maren', [{'word': 'maren', 'index': 1}], 'd/a.wav')
    """
    try:
        row = json.loads(raw)
    except json.JSONDecodeError as err:
        raise ManifestError(f"{where}: not a JSON object ({err.msg})") from None
    if not isinstance(row, dict):
        raise ManifestError(f"{where}: expected a JSON object with 'audio' and 'text', got {type(row).__name__}")
    unknown = sorted(set(row) - set(KEYS))
    if unknown:
        raise ManifestError(f"{where}: unknown field {unknown[0]!r}; fields: {', '.join(KEYS)}")
    for key in ("audio", "text"):
        if not isinstance(row.get(key), str) or not row[key].strip():
            raise ManifestError(f"{where}: field {key!r} must be a non-empty string")
    text = normalize(row["text"])
    try:
        encode(text, where=f"{where}: transcript")
    except TokenError as err:
        raise ManifestError(str(err)) from None
    lst = row.get("list")
    if lst is not None:
        if not isinstance(lst, list) or not all(isinstance(w, str) and w.strip() for w in lst):
            raise ManifestError(f"{where}: field 'list' must be a list of non-empty strings")
        lst = [normalize(w) for w in lst]
        for w in lst:
            try:
                encode(w, where=f"{where}: list entry {w!r}")
            except TokenError as err:
                raise ManifestError(str(err)) from None
    spans = _spans(row.get("spans", []), text.split(), where)
    audio = Path(row["audio"])
    return Line(where, str(row.get("id") or where), audio if audio.is_absolute() else folder / audio, text,
                str(row.get("speaker", "")), lst, spans)


def _spans(raw, words: list[str], where: str) -> list[dict]:
    if not isinstance(raw, list):
        raise ManifestError(f"{where}: field 'spans' must be a list of words or objects with 'word'")
    used, out = set(), []
    for k, sp in enumerate(raw):
        sp = {"word": sp} if isinstance(sp, str) else sp
        if not isinstance(sp, dict) or not isinstance(sp.get("word"), str):
            raise ManifestError(f"{where}: spans[{k}] must be a word or an object with a 'word' string")
        bad = sorted(set(sp) - set(SPAN_KEYS))
        if bad:
            raise ManifestError(f"{where}: spans[{k}] has unknown field {bad[0]!r}; fields: {', '.join(SPAN_KEYS)}")
        word = normalize(sp["word"])
        if "index" in sp:
            i = sp["index"]
            if not isinstance(i, int) or not 0 <= i < len(words) or words[i] != word:
                raise ManifestError(f"{where}: spans[{k}] index {i!r} does not point at {word!r} in the transcript")
        else:
            hits = [i for i, w in enumerate(words) if w == word and i not in used]
            if not hits:
                raise ManifestError(f"{where}: spans[{k}] word {word!r} is not in the transcript")
            i = hits[0]
        used.add(i)
        out.append({**sp, "word": word, "index": i})
    return out


def read_manifest(path: str | Path, skip_bad: bool = False) -> tuple[list[Line], list[str]]:
    """Lines of a manifest, and the messages of the lines skipped (only with skip_bad; otherwise
    the first bad line raises). Blank lines are ignored; duplicate ids are bad lines."""
    path = Path(path)
    if not path.is_file():
        raise ManifestError(f"manifest {path} not found")
    lines, skipped, ids = [], [], set()
    with open(path, encoding="utf-8") as f:
        for lineno, raw in enumerate(f, 1):
            if not raw.strip():
                continue
            try:
                line = parse_line(raw, f"{path}:{lineno}", path.parent)
                if line.id in ids:
                    raise ManifestError(f"{line.where}: id {line.id!r} appears twice in the manifest")
            except ManifestError as err:
                if not skip_bad:
                    raise
                skipped.append(str(err))
                continue
            ids.add(line.id)
            lines.append(line)
    return lines, skipped


def write_manifest(path: str | Path, rows: list[dict]) -> None:
    """Write rows as a manifest (temporary file, then rename)."""
    path = Path(path)
    tmp = path.with_name(f".{path.name}.tmp")
    with open(tmp, "w", encoding="utf-8") as f:
        for row in rows:
            f.write(json.dumps(row) + "\n")
    tmp.replace(path)
