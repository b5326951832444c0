"""Shallow-fusion contextual boosting: an automaton over the listed entries that scores beam hypotheses.

Explicit biasing needs no training: while beam search extends a hypothesis by a
token, the scorer adds a bonus when the token extends a partial match of a
listed entry, takes the bonus back when the match fails, and lets a completed
entry keep it (the subtractive failure cost of Zhao et al., Interspeech 2019,
"Shallow-fusion end-to-end contextual biasing").

Automaton. Each entry becomes the token pattern SPACE + entry + SPACE, and the
hypothesis is read as SPACE + text + SPACE, so matches start and end at word
boundaries. The patterns go into a prefix tree with Aho-Corasick failure links
(Aho & Corasick, CACM 1975); `goto` is the full transition table (node, token)
-> node, failure links folded in, built one tree level at a time with numpy.

Bonus. A node's worth is the number of tokens matched after the leading
boundary (letters and inner spaces), times the boost weight w. Per hypothesis
the scorer keeps its node, the bonus earned by the current partial match
(`partial`), its length and the length at its last completed match. A token
that extends the match earns w; a failure moves to the longest matching suffix
and the score changes by (worth of that suffix - partial): what the abandoned
match earned is taken back. A completing token (the trailing boundary) commits
the entry's bonus, and later bonuses never count the committed tokens again.
Beam search applies one final boundary at the end of the utterance, so a
partial match still open there is taken back and a listed last word completes.

After-trigger mode. Trigger phrases are given per entity class; an entry of
class c earns its bonus only when its match starts right after one of c's
trigger phrases (a second, shared automaton over the trigger phrases arms the
classes whose phrase has just ended at a word boundary).

Notation (our own) for trigger phrases: per class one string, phrases separated
by "|", e.g. {"invented_name": "call | send a message to"}. In a biasing list
file a line "[class] after: phrase | phrase" (or just "[class]") starts a class
section; entries below it belong to that class (tinyrnnt.lab.evaluate.read_list_file).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Mapping, Sequence

import numpy as np
import torch
from torch import Tensor

from tinyrnnt.config import ConfigError
from tinyrnnt.text import SPACE, TOKENS, VOCAB_SIZE, TokenError, encode, normalize, normalize_all

BOOST_WHERE = ("anywhere", "after_trigger")
MAX_CLASSES = 62  # class masks are int64 bit sets


def parse_triggers(triggers: Mapping[str, str], where: str = "decode.triggers") -> dict[str, list[str]]:
    """{"class": "phrase | phrase"} -> {"class": ["phrase", ...]}; errors name the class and phrase.

    >>> parse_triggers({"crew": "call | send a message to"})
    {'crew': ['call', 'send a message to']}
    """
    if not isinstance(triggers, Mapping):
        raise ConfigError(f"{where} must map an entity class to its trigger phrases ('call | ring'), "
                          f"got {type(triggers).__name__}")
    out = {}
    for cls, text in triggers.items():
        if not isinstance(text, str):
            raise ConfigError(f"{where}.{cls} must be a string of phrases separated by '|', got {text!r}")
        phrases = [normalize(p) for p in text.split("|")]
        for k, p in enumerate(phrases):
            if not p:
                raise ConfigError(f"{where}.{cls}: trigger phrase {k + 1} of {text!r} is empty; "
                                  "expected phrases separated by '|', e.g. 'call | ring'")
            try:
                encode(p, where=f"{where}.{cls} phrase {p!r}")
            except TokenError as err:
                raise ConfigError(str(err)) from None
        out[str(cls)] = list(dict.fromkeys(phrases))
    return out


def check_weight(weight, where: str = "decode.boost_weight") -> float:
    try:
        w = float(weight)
    except (TypeError, ValueError):
        raise ConfigError(f"{where} must be a finite number, got {weight!r}") from None
    if not math.isfinite(w):
        raise ConfigError(f"{where} must be a finite number, got {weight!r}")
    return w


class BoostAutomaton:
    """Aho-Corasick automaton over SPACE + entry + SPACE patterns, with class bit sets per node.

    >>> a = BoostAutomaton(["kell", "kell harbour", "lark"])
    >>> [(end, entry) for end, entry in a.matches("dock at kell harbour lark")]
    [(13, 'kell'), (21, 'kell harbour'), (26, 'lark')]
    """

    def __init__(self, entries: Sequence[str], classes: Sequence[int] | None = None, where: str = "biasing list"):
        entries = normalize_all(entries)
        classes = [0] * len(entries) if classes is None else list(classes)
        if len(classes) != len(entries):
            raise ValueError(f"{len(entries)} entries but {len(classes)} classes")
        self.entries = entries
        self._build(_patterns(entries, where), np.asarray(classes, dtype=np.int64))

    def _build(self, pats: tuple[np.ndarray, np.ndarray], classes: np.ndarray) -> None:
        V = VOCAB_SIZE
        padded, lengths = pats
        N = len(lengths)
        L = int(lengths.max()) if N else 0
        # prefix tree, one level at a time; node ids in breadth-first order, root 0
        node = np.zeros(N, dtype=np.int64)
        parent, token, depth = [np.zeros(1, np.int64)], [np.zeros(1, np.int64)], [np.zeros(1, np.int64)]
        bits = (np.int64(1) << classes) if N else np.zeros(0, np.int64)
        through = [np.zeros(1, np.int64)]  # class bits of the patterns through each node
        n_nodes = 1
        for d in range(L):
            active = np.nonzero(lengths > d)[0]
            keys, inverse = np.unique(node[active] * V + padded[active, d], return_inverse=True)
            inverse = inverse.reshape(-1)
            node[active] = n_nodes + inverse
            parent.append(keys // V)
            token.append(keys % V)
            depth.append(np.full(len(keys), d + 1, np.int64))
            mask = np.zeros(len(keys), np.int64)
            np.bitwise_or.at(mask, inverse, bits[active])
            through.append(mask)
            n_nodes += len(keys)
        parent, token, depth = np.concatenate(parent), np.concatenate(token), np.concatenate(depth)
        through = np.concatenate(through)
        own = np.zeros(n_nodes, np.int64)  # class bits of the patterns ending here
        if N:
            np.bitwise_or.at(own, node, bits)
        child = np.full((n_nodes, V), -1, dtype=np.int32)
        if n_nodes > 1:
            child[parent[1:], token[1:]] = np.arange(1, n_nodes)
        goto = np.zeros((n_nodes, V), dtype=np.int32)
        fail = np.zeros(n_nodes, dtype=np.int64)
        goto[0] = np.where(child[0] >= 0, child[0], 0)
        # done_len: matched tokens (without the two boundaries) of the longest pattern ending
        # here or at a failure-link suffix, -1 if none; done_bits: its class bits
        done_len = np.where(own != 0, depth - 2, -1)
        done_bits = own.copy()
        level = np.searchsorted(depth, np.arange(L + 2))  # breadth-first ids: depth d is level[d]:level[d + 1]
        for d in range(1, L + 1):
            at = slice(level[d], level[d + 1])
            if d > 1:
                fail[at] = goto[fail[parent[at]], token[at]]
            row = goto[fail[at]]  # where the node has no child for a token: its failure link's move
            np.copyto(row, child[at], where=child[at] >= 0)
            goto[at] = row
            inherit = done_len[at] < 0
            done_len[at] = np.where(inherit, done_len[fail[at]], done_len[at])
            done_bits[at] = np.where(inherit, done_bits[fail[at]], done_bits[at])
        self.goto, self.fail, self.depth = goto, fail, depth
        self.through, self.done_len, self.done_bits = through, done_len, done_bits
        self.pattern_of = np.full(n_nodes, -1, np.int64)  # node -> an entry ending there
        if N:
            self.pattern_of[node] = np.arange(N)
        self.start = int(goto[0, SPACE])  # the hypothesis is read as SPACE + text
        self.n_nodes = n_nodes

    def matches(self, text: str) -> list[tuple[int, str]]:
        """(end index in SPACE + text + SPACE, entry) of every match, suffix matches included."""
        found, s = [], 0
        for i, tok in enumerate(encode_padded(" " + normalize(text) + " ")):
            s = k = int(self.goto[s, tok])
            while k > 0:  # every pattern ending here: follow the failure links
                if self.pattern_of[k] >= 0:
                    found.append((i, self.entries[self.pattern_of[k]]))
                k = int(self.fail[k])
        return found


_TABLE = np.full(128, -1, dtype=np.int64)  # code point -> token id (space included), -1 = not a token
for _tok, _ch in enumerate(TOKENS[1:], 1):
    _TABLE[ord(_ch)] = _tok


def _patterns(entries: list[str], where: str) -> tuple[np.ndarray, np.ndarray]:
    """SPACE + entry + SPACE as token ids, all entries at once: (N, L) padded and lengths (N,)."""
    for i, e in enumerate(entries):
        if not e:
            raise ConfigError(f"{where} entry {i + 1} is empty; expected a word or phrase")
    lengths = np.fromiter(map(len, entries), dtype=np.int64, count=len(entries)) + 2
    text = "".join(f" {e} " for e in entries)
    codes = np.frombuffer(text.encode("utf-32-le"), dtype=np.uint32)
    flat = _TABLE[np.minimum(codes, len(_TABLE) - 1)]
    if (flat < 0).any():
        i = int(np.searchsorted(np.cumsum(lengths), np.argmax(flat < 0), side="right"))
        try:
            encode(entries[i], where=f"{where} entry {i + 1} ({entries[i]!r})")
        except TokenError as err:
            raise ConfigError(str(err)) from None
    L = int(lengths.max()) if len(entries) else 0
    padded = np.zeros((len(entries), L), dtype=np.int64)
    padded[np.arange(L)[None, :] < lengths[:, None]] = flat
    return padded, lengths


_CACHE: dict[tuple, "BoostAutomaton"] = {}
_CACHE_NODES = [0]
CACHE_NODE_BUDGET = 2_000_000  # about 230 MB of transition tables


def automaton(entries: Sequence[str], classes: Sequence[int] | None = None) -> "BoostAutomaton":
    """A cached BoostAutomaton: a tuning sweep decodes the same lists once per weight."""
    key = (tuple(entries), None if classes is None else tuple(classes))
    if key not in _CACHE:
        auto = BoostAutomaton(entries, classes)
        if _CACHE_NODES[0] + auto.n_nodes > CACHE_NODE_BUDGET:
            _CACHE.clear()
            _CACHE_NODES[0] = 0
        _CACHE[key] = auto
        _CACHE_NODES[0] += auto.n_nodes
    return _CACHE[key]


def encode_padded(text: str) -> list[int]:
    """Token ids of a text whose leading and trailing spaces are kept (boundaries)."""
    from tinyrnnt.text import _INDEX

    return [_INDEX[ch] for ch in text]


@dataclass
class BoostState:
    """Per hypothesis row: entry-automaton node, trigger-automaton node, tokens so far, tokens at the
    last completed match, bonus earned by the open partial match, armed class bits."""

    node: Tensor
    trig: Tensor
    length: Tensor
    committed_at: Tensor
    partial: Tensor
    armed: Tensor

    def select(self, index: Tensor) -> "BoostState":
        return BoostState(*(getattr(self, f).index_select(0, index) for f in self.__dataclass_fields__))

    @staticmethod
    def cat(states: Sequence["BoostState"]) -> "BoostState":
        return BoostState(*(torch.cat([getattr(s, f) for s in states]) for f in BoostState.__dataclass_fields__))


class Booster:
    """The shallow-fusion scorer for a batch: one automaton per utterance row, flattened with offsets.

    rows: one entry list per hypothesis row (rows of one utterance share the same list object,
    stored once). classes: per row, the entity class of each entry (names); triggers: class ->
    phrases (after-trigger mode only).
    """

    def __init__(self, lists: Sequence[Sequence[str]], weight: float, where: str = "anywhere",
                 classes: Sequence[Sequence[str]] | None = None, triggers: Mapping[str, list[str]] | None = None):
        if where not in BOOST_WHERE:
            raise ConfigError(f"decode.boost_where must be one of {list(BOOST_WHERE)}, got {where!r}")
        self.weight = check_weight(weight)
        self.where = where
        class_ids: dict[str, int] = {}
        if where == "after_trigger":
            if not triggers:
                raise ConfigError("decode.boost_where=after_trigger needs trigger phrases (decode.triggers, "
                                  "or '[class] after: ...' lines in the list file)")
            class_ids = {c: k for k, c in enumerate(sorted(triggers))}
            if len(class_ids) > MAX_CLASSES:
                raise ConfigError(f"decode.triggers: at most {MAX_CLASSES} classes, got {len(class_ids)}")
        place: dict[int, int] = {}
        tables, offsets, total = [], [], 0
        for r, words in enumerate(lists):
            if id(words) not in place:
                if where == "after_trigger":
                    cls = classes[r] if classes is not None else [None] * len(words)
                    keep = [k for k, c in enumerate(cls) if c in class_ids]  # classes without triggers: no boost
                    auto = automaton([words[k] for k in keep], [class_ids[cls[k]] for k in keep])
                else:
                    auto = automaton(words)
                place[id(words)] = total
                tables.append((total, auto))
                total += auto.n_nodes
            offsets.append(place[id(words)])
        goto = np.zeros((total, VOCAB_SIZE), np.int32)
        depth, through = np.zeros(total, np.int64), np.zeros(total, np.int64)
        done_len, done_bits = np.full(total, -1, np.int64), np.zeros(total, np.int64)
        starts = {}
        for start, auto in tables:
            end = start + auto.n_nodes
            goto[start:end] = auto.goto + start
            depth[start:end], through[start:end] = auto.depth, auto.through
            done_len[start:end], done_bits[start:end] = auto.done_len, auto.done_bits
            starts[start] = start + auto.start
        self.goto = torch.from_numpy(goto)
        self.worth = torch.from_numpy(np.maximum(depth - 1, 0)).float()  # tokens after the leading boundary
        self.through = torch.from_numpy(through)
        self.done_len = torch.from_numpy(done_len).float()
        self.done_bits = torch.from_numpy(done_bits)
        self.row_start = torch.tensor([starts[o] for o in offsets], dtype=torch.long)
        if where == "after_trigger":
            phrases, owner = [], []
            for c, ps in triggers.items():
                phrases += ps
                owner += [class_ids[c]] * len(ps)
            trig = BoostAutomaton(phrases, owner, where="trigger phrase")
            self.trig_goto = torch.from_numpy(trig.goto)
            self.trig_done = torch.from_numpy(np.where(trig.done_len >= 0, trig.done_bits, 0))
            self.trig_start = trig.start
        self.n_rows = len(lists)

    def start(self, rows: Tensor | None = None) -> BoostState:
        rows = torch.arange(self.n_rows) if rows is None else rows
        n = len(rows)
        z = torch.zeros(n, dtype=torch.long)
        trig = torch.full((n,), getattr(self, "trig_start", 0), dtype=torch.long)
        return BoostState(self.row_start[rows], trig, z, z.clone(), torch.zeros(n), z.clone())

    def _targets(self, st: BoostState, nxt: Tensor, length: Tensor):
        """Bonus earned by the open match after moving to `nxt` (..., same leading shape as st rows),
        whether a pattern completes there, and the completed pattern's bonus."""
        cap = (length - st.committed_at).float()
        worth = torch.minimum(self.worth[nxt], cap)
        done = self.done_len[nxt] >= 0
        done_worth = torch.minimum(self.done_len[nxt], cap)
        if self.where == "after_trigger":
            armed = st.armed.view(st.armed.shape + (1,) * (nxt.dim() - 1))
            worth = worth * ((self.through[nxt] & armed) != 0)
            gated = (self.done_bits[nxt] & armed) != 0
            done = done & gated
        return worth, done, done_worth

    def deltas(self, st: BoostState) -> Tensor:
        """(R, V) score change of every next token for every row (blank column 0)."""
        nxt = self.goto[st.node].long()  # (R, V)
        length = (st.length + 1)[:, None]
        worth, done, done_worth = self._targets(_expand(st), nxt, length)
        d = self.weight * (torch.where(done, done_worth, worth) - st.partial[:, None])
        d[:, 0] = 0.0
        return d

    def advance(self, st: BoostState, tokens: Tensor) -> BoostState:
        """State after each row emitted its (non-blank) token."""
        nxt = self.goto[st.node, tokens].long()
        length = st.length + 1
        worth, done, _ = self._targets(st, nxt, length)
        partial = torch.where(done, torch.zeros_like(worth), worth)
        committed_at = torch.where(done, length, st.committed_at)
        armed, trig = st.armed, st.trig
        if self.where == "after_trigger":
            trig = self.trig_goto[st.trig, tokens].long()
            space = tokens == SPACE
            inside = (partial > 0) & ~done  # a multi-word entry still open: keep its arming
            armed = torch.where(space, self.trig_done[trig] | torch.where(inside, st.armed, 0), st.armed)
        return BoostState(nxt, trig, length, committed_at, partial, armed)

    def final(self, st: BoostState) -> Tensor:
        """(R,) score change of the end-of-utterance boundary (a final SPACE)."""
        return self.deltas(st)[:, SPACE]


def _expand(st: BoostState) -> BoostState:
    """Row fields broadcast against a (R, V) table."""
    return BoostState(st.node, st.trig, st.length[:, None], st.committed_at[:, None], st.partial[:, None],
                      st.armed)


def sequence_bonus(entries: Sequence[str], text: str, weight: float, where: str = "anywhere",
                   classes: Sequence[str] | None = None, triggers: Mapping[str, list[str]] | None = None) -> float:
    """Total bonus the scorer gives one finished text (token by token, then the final boundary)."""
    b = Booster([list(entries)], weight, where, [list(classes)] if classes is not None else None, triggers)
    st, total = b.start(), 0.0
    for tok in encode(text) if text else []:
        t = torch.tensor([tok])
        total += float(b.deltas(st)[0, tok])
        st = b.advance(st, t)
    return total + float(b.final(st)[0])
