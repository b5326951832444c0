"""Prefix tree over a biasing list and the next-token cue it gives the joiner.

Trie-based deep biasing (Jain et al., Interspeech 2020; Le et al.,
Interspeech 2021): at every label-history position the model is told which
tokens could come next if the word being spelled were finished as one of
the listed words.

Cue definition. For a history y_1..y_u (u = 0..U; u = 0 is the empty
history) the *partial word* is the tokens since the last SPACE. The cue at u
is a multi-hot vector over the V tokens:

- the tokens that extend the partial word towards some listed word;
- SPACE as well, when the partial word is itself a listed word;
- all zeros when the partial word is a prefix of no listed word ("dead"
  until the next SPACE, which brings us back to the root);
- BLANK is never set.

At a word start (empty partial word: u = 0 or y_u = SPACE) the setting
`word_start` decides: "first_tokens" (default) gives the first tokens of all
listed words (the root's children); "none" gives all zeros.

Layout. `PrefixTree` keeps dense numpy tables, node 0 = root: `child`
(n_nodes, V) int32 with -1 = no child, `node_cue` (n_nodes, V) bool and
`terminal` (n_nodes,) bool. `BatchedTrees` flattens one tree per utterance
into one torch table with offsets, so a batch's lookups are single gathers.

Deliberately not here: phrases (entries with a space are refused), any
boosting of scores, any model code.
"""

from __future__ import annotations

import time
from typing import Sequence

import numpy as np
import torch
from torch import Tensor

from tinyrnnt.text import BLANK, SPACE, TOKENS, VOCAB_SIZE, check_text, encode, normalize_all

WORD_START_CHOICES = ("first_tokens", "none")
_CHAR_ID = {ch: i for i, ch in enumerate(TOKENS) if i != BLANK}
_CHAR_TABLE = np.full(128, -1, dtype=np.int64)  # code point -> token id, -1 = not a word character
for _ch, _i in _CHAR_ID.items():
    _CHAR_TABLE[ord(_ch)] = _i
_CHAR_TABLE[ord(" ")] = -1  # spaces were refused before; never a word token


def _check_word_start(word_start: str) -> None:
    if word_start not in WORD_START_CHOICES:
        raise ValueError(f"word_start must be one of {WORD_START_CHOICES}, got {word_start!r}")


class PrefixTree:
    """Prefix tree over the words of one biasing list (duplicates collapse).

    >>> tree = PrefixTree(["kell", "kelso", "mara"])
    >>> sorted(tree.next_tokens("kel")), tree.next_tokens("kell"), tree.next_tokens("x")
    (['l', 's'], {' '}, set())
    >>> tree.lookup(""), tree.lookup("ma") > 0, tree.lookup("mo")
    (0, True, -1)
    """

    def __init__(self, words: Sequence[str], vocab_size: int = VOCAB_SIZE):
        if isinstance(words, str):
            raise TypeError("words must be a sequence of words (a biasing list), not one string")
        if vocab_size < VOCAB_SIZE:
            raise ValueError(f"words given as text need vocab_size >= {VOCAB_SIZE} (the character inventory), "
                             f"got {vocab_size}")
        words = list(words)
        for i, word in enumerate(words):
            if not isinstance(word, str):
                raise TypeError(f"biasing list entry {i} ({word!r}) is a {type(word).__name__}, expected a string")
        texts = normalize_all(words)
        for i, text in enumerate(texts):
            if not text or " " in text:  # error path only: the loop stops at the first bad entry
                where = f"biasing list entry {i} ({words[i]!r})"
                if not text:
                    raise ValueError(f"{where} is empty; expected a word of at least one character")
                raise ValueError(
                    f"{where} is a phrase (it holds a space); phrases are not supported by the "
                    "prefix-tree cue yet, expected single words"
                )
        lengths = np.fromiter(map(len, texts), dtype=np.int64, count=len(texts))
        # All characters at once through a code-point table; -1 = outside the inventory.
        codes = np.frombuffer("".join(texts).encode("utf-32-le"), dtype=np.uint32)
        flat = _CHAR_TABLE[np.minimum(codes, len(_CHAR_TABLE) - 1)]
        if (flat < 0).any():
            i = int(np.searchsorted(np.cumsum(lengths), np.argmax(flat < 0), side="right"))
            encode(texts[i], where=f"biasing list entry {i} ({words[i]!r})")  # raises TokenError
        self._build(flat, lengths, vocab_size)

    @classmethod
    def from_token_ids(cls, words: Sequence[Sequence[int]], vocab_size: int = VOCAB_SIZE) -> "PrefixTree":
        """Build from token-id sequences (no BLANK, no SPACE inside a word).

        >>> PrefixTree.from_token_ids([[13, 7, 14, 14]]).next_tokens("kel")  # k e l l
        {'l'}
        """
        if isinstance(words, (str, bytes)):
            raise TypeError("words must be a sequence of token-id sequences, not one string")
        words = [np.asarray(w, dtype=np.int64).reshape(-1) for w in words]
        lengths = np.fromiter(map(len, words), dtype=np.int64, count=len(words))
        flat = np.concatenate(words) if words else np.zeros(0, dtype=np.int64)
        empty = np.nonzero(lengths == 0)[0]
        if len(empty):
            raise ValueError(f"biasing list entry {empty[0]} is empty; expected a word of at least one token")
        bad = (flat <= SPACE) | (flat >= vocab_size)
        if bad.any():
            i = int(np.searchsorted(np.cumsum(lengths), np.argmax(bad), side="right"))
            what = "holds SPACE: phrases are not supported by the prefix-tree cue yet, expected single words" \
                if SPACE in words[i] else f"holds a token id outside {SPACE + 1}..{vocab_size - 1} (not a word token)"
            raise ValueError(f"biasing list entry {i} ({words[i].tolist()}) {what}")
        tree = cls.__new__(cls)
        tree._build(flat, lengths, vocab_size)
        return tree

    def _build(self, flat: np.ndarray, lengths: np.ndarray, vocab_size: int) -> None:
        """Tables from checked words given as concatenated token ids and lengths."""
        V = int(vocab_size)
        N = len(lengths)
        L = int(lengths.max()) if N else 0
        padded = np.zeros((N, L), dtype=np.int64)  # (N, L) words, row-major = concatenation order
        padded[np.arange(L)[None, :] < lengths[:, None]] = flat
        # One vectorised step per depth: the nodes at depth d+1 are the distinct
        # (parent node, token) pairs among the words longer than d. Node ids come
        # out in breadth-first order, root = 0.
        node = np.zeros(N, dtype=np.int64)  # each word's node at the current depth
        parents, tokens, n_nodes = [], [], 1
        for d in range(L):
            active = np.nonzero(lengths > d)[0]
            keys, inverse = np.unique(node[active] * V + padded[active, d], return_inverse=True)
            node[active] = n_nodes + inverse.reshape(-1)
            parents.append(keys // V)
            tokens.append(keys % V)
            n_nodes += len(keys)
        child = np.full((n_nodes, V), -1, dtype=np.int32)
        if L:
            child[np.concatenate(parents), np.concatenate(tokens)] = np.arange(1, n_nodes, dtype=np.int32)
        terminal = np.zeros(n_nodes, dtype=bool)
        terminal[node] = True  # after the loop `node` holds each word's last node
        node_cue = child >= 0
        node_cue[:, SPACE] = terminal  # SPACE never has a child: words hold no space
        self.vocab_size = V
        self.child, self.node_cue, self.terminal = child, node_cue, terminal
        self.max_depth = L
        self.n_words = int(terminal.sum())  # distinct words

    @property
    def n_nodes(self) -> int:
        return int(self.child.shape[0])

    def lookup(self, prefix: str) -> int:
        """Node id reached by spelling `prefix` (a partial word) from the root, or -1.

        >>> PrefixTree(["mara"]).lookup("mar"), PrefixTree(["mara"]).lookup("mara ")
        (3, -1)
        """
        check_text(prefix, where=f"prefix {prefix!r}")
        node = 0
        for ch in prefix:
            node = int(self.child[node, _CHAR_ID[ch]])  # SPACE has no child: -1
            if node < 0:
                return -1
        return node

    def next_tokens(self, prefix: str) -> set[str]:
        """The cue for a partial word as a set of characters (" " = the word may end here).

        >>> sorted(PrefixTree(["kell", "mara"]).next_tokens(""))
        ['k', 'm']
        """
        node = self.lookup(prefix)
        if node < 0:
            return set()
        return {TOKENS[t] for t in np.nonzero(self.node_cue[node])[0]}


class BatchedTrees:
    """Several trees (one per utterance) flattened into one node table with offsets,
    so lookups for a batch are single gathers.

    Node ids are global. The same tree object given twice is stored once.

    >>> bt = BatchedTrees([PrefixTree(["kell"]), PrefixTree(["mara"])])
    >>> b = torch.tensor([0, 1]); node = bt.root(b)
    >>> node = bt.advance(node, torch.tensor([13, 15]), b)  # k, m
    >>> bt.cue(node)[:, [7, 3]].tolist()  # e, a
    [[1.0, 0.0], [0.0, 1.0]]
    """

    def __init__(self, trees: Sequence[PrefixTree]):
        if len(trees) == 0:
            raise ValueError("BatchedTrees needs at least one tree (one per utterance)")
        V = trees[0].vocab_size
        if any(t.vocab_size != V for t in trees):
            raise ValueError(f"all trees must share one vocab_size, got {sorted({t.vocab_size for t in trees})}")
        place: dict[int, int] = {}  # id(tree) -> offset of its root
        unique, offsets, total = [], [], 0
        for tree in trees:
            if id(tree) not in place:
                place[id(tree)] = total
                unique.append((total, tree))
                total += tree.n_nodes
            offsets.append(place[id(tree)])
        # subtle: one extra all-dead row at the END. A dead node is -1, and index -1
        # reads the last row, so child[-1, t] == -1 and node_cue[-1] == 0: dead stays
        # dead and cues zero in plain gathers, with no masking.
        child = np.full((total + 1, V), -1, dtype=np.int32)
        node_cue = np.zeros((total + 1, V), dtype=bool)
        terminal = np.zeros(total + 1, dtype=bool)
        for start, tree in unique:
            end = start + tree.n_nodes
            np.add(tree.child, start, out=child[start:end], where=tree.child >= 0)  # local -> global ids
            node_cue[start:end] = tree.node_cue
            terminal[start:end] = tree.terminal
        is_root = np.zeros(total + 1, dtype=bool)
        is_root[[start for start, _ in unique]] = True
        self._set(torch.from_numpy(child), torch.from_numpy(node_cue), torch.from_numpy(terminal),
                  torch.from_numpy(is_root), torch.tensor(offsets, dtype=torch.long))

    def _set(self, child: Tensor, node_cue: Tensor, terminal: Tensor, is_root: Tensor, offsets: Tensor) -> None:
        self.child = child  # (n_total + 1, V) int32, last row = dead
        self.node_cue = node_cue  # (n_total + 1, V) bool
        self.terminal = terminal  # (n_total + 1,) bool
        self.is_root = is_root  # (n_total + 1,) bool
        self.offsets = offsets  # (B,) long: root node of each utterance's tree
        self.vocab_size = int(child.shape[1])

    def __len__(self) -> int:
        return int(self.offsets.shape[0])

    def to(self, device) -> "BatchedTrees":
        if self.offsets.device == torch.device(device):
            return self
        moved = BatchedTrees.__new__(BatchedTrees)
        moved._set(*(t.to(device) for t in (self.child, self.node_cue, self.terminal, self.is_root, self.offsets)))
        return moved

    def root(self, b: Tensor) -> Tensor:
        """Root node of utterance b's tree (the state for an empty history)."""
        return self.offsets[b]

    def advance(self, nodes: Tensor, tokens: Tensor, batch_index: Tensor) -> Tensor:
        """One decode-time step, all (B,) long: SPACE -> root of that utterance's tree;
        BLANK -> unchanged; dead (-1) stays dead until SPACE; else the child or -1."""
        step = self.child[nodes, tokens].long()  # dead row and missing children give -1
        step = torch.where(tokens == SPACE, self.offsets[batch_index], step)
        return torch.where(tokens == BLANK, nodes, step)

    def cue(self, nodes: Tensor, word_start: str = "first_tokens", at_word_start: Tensor | None = None) -> Tensor:
        """(B, V) float multi-hot cue for the current nodes.

        With word_start="none" the cue is zero at word starts; by default a node is
        at a word start when it is its tree's root, `at_word_start` (B,) bool overrides.
        """
        _check_word_start(word_start)
        cue = self.node_cue[nodes]
        if word_start == "none":
            start = self.is_root[nodes] if at_word_start is None else at_word_start.bool()
            cue = cue & ~start[:, None]
        return cue.float()


def training_cue(targets: Tensor, target_lengths: Tensor, trees: BatchedTrees | Sequence[PrefixTree],
                 word_start: str = "first_tokens") -> Tensor:
    """Cue for every label-history position u = 0..U of a batch: (B, U+1, V) float32.

    Row u is the cue after y_1..y_u; rows u > target_length are zero. Vectorised:
    the depth of every position within its word comes from one cummax, then one
    gather per depth d = 1..(longest word in the batch) walks all positions of
    depth d at once, node[p] = child[node[p-1], y[p]]. The cost follows the number
    of tokens in the batch, not the list size.

    >>> y = torch.tensor([encode("kel ma")])
    >>> cue = training_cue(y, torch.tensor([6]), [PrefixTree(["kell", "kelso", "mara"])])
    >>> [decode_cue(row) for row in cue[0]]
    ['km', 'e', 'l', 'ls', 'km', 'a', 'r']
    """
    _check_word_start(word_start)
    if not isinstance(trees, BatchedTrees):
        trees = BatchedTrees(trees)
    if targets.dim() != 2:
        raise ValueError(f"targets must be (B, U) token ids, got shape {tuple(targets.shape)}")
    B, U = targets.shape
    if len(trees) != B:
        raise ValueError(f"need one tree per utterance: {len(trees)} trees for a batch of {B}")
    device = targets.device
    trees = trees.to(device)
    lengths = target_lengths.to(device).long()
    if lengths.shape != (B,) or bool(((lengths < 0) | (lengths > U)).any()):
        raise ValueError(f"target_lengths must be (B,) = ({B},) with values in 0..{U}, got {target_lengths.tolist()}")
    pos = torch.arange(U + 1, device=device)  # (U+1,)
    valid = pos[None, :] <= lengths[:, None]  # (B, U+1)
    # subtle: off-by-one at U+1. y[:, u] is the token that led to position u;
    # position 0 and padding are treated as SPACE so they sit at the root.
    y = torch.full((B, U + 1), SPACE, dtype=torch.long, device=device)
    y[:, 1:] = targets.long()
    y = torch.where(valid, y, torch.full_like(y, SPACE))
    bad = (y <= BLANK) | (y >= trees.vocab_size)
    if bool(bad.any()):
        b, u = (int(i) for i in bad.nonzero()[0])
        raise ValueError(f"targets[{b}, {u - 1}] = {int(y[b, u])} is not a label token "
                         f"(expected ids {SPACE}..{trees.vocab_size - 1}; BLANK is never a label)")
    last_reset = torch.where(y == SPACE, pos, 0).cummax(dim=1).values  # (B, U+1)
    depth = (pos - last_reset).reshape(-1)  # tokens since the last SPACE, (B*(U+1),)
    node = trees.offsets.repeat_interleave(U + 1)  # every position starts at its root
    flat_y = y.reshape(-1)
    max_depth = int(depth.max())
    if max_depth > 0:
        order = torch.argsort(depth, stable=True)  # positions grouped by depth
        ends = torch.bincount(depth, minlength=max_depth + 1).cumsum(0).tolist()
        for d in range(1, max_depth + 1):
            p = order[ends[d - 1]:ends[d]]
            # depth >= 1 means p-1 is the previous position of the same utterance
            node[p] = trees.child[node[p - 1], flat_y[p]].long()
    keep = valid.reshape(-1)
    if word_start == "none":
        keep = keep & (depth != 0)
    cue = trees.node_cue[node] & keep[:, None]  # (B*(U+1), V)
    return cue.float().view(B, U + 1, trees.vocab_size)


def decode_cue(row: Tensor) -> str:
    """A cue row as the characters it marks, in token order (for reading and doctests).

    >>> decode_cue(torch.tensor([0., 1., 0., 1.]))
    ' a'
    """
    return "".join(TOKENS[i] for i in torch.nonzero(row).reshape(-1).tolist())


def invented_words(n: int, rng: np.random.Generator, min_len: int = 4, max_len: int = 10) -> list[str]:
    """Random pronounceable made-up words (consonant-vowel alternation), for benchmarks.

    >>> all(4 <= len(w) <= 10 for w in invented_words(50, np.random.default_rng(0)))
    True
    """
    cons, vows = np.array(list("bcdfghjklmnprstvwz")), np.array(list("aeiou"))
    lens = rng.integers(min_len, max_len + 1, size=n)
    letters = np.where(np.arange(max_len) % 2 == 0, 1, 0)[None, :].repeat(n, 0)
    letters = np.where(rng.random((n, 1)) < 0.5, letters, 1 - letters)  # start on either kind
    pick = np.where(letters == 1, cons[rng.integers(0, len(cons), (n, max_len))],
                    vows[rng.integers(0, len(vows), (n, max_len))])
    return ["".join(row[:k]) for row, k in zip(pick, lens)]


def time_build(list_size: int, repeats: int = 5, seed: int = 0) -> float:
    """Milliseconds to build one PrefixTree over `list_size` invented words (median)."""
    words = invented_words(list_size, np.random.default_rng(seed))
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        PrefixTree(words)
        times.append(time.perf_counter() - t0)
    return 1000 * float(np.median(times))


def time_cue(list_size: int, batch: int = 32, U: int = 52, repeats: int = 20, seed: int = 0) -> float:
    """Milliseconds per training_cue call (median), trees prebuilt.

    Each utterance gets its own list of `list_size` invented words; its target is
    invented words with some list words inside, cut to U tokens (lengths U/2..U).
    """
    rng = np.random.default_rng(seed)
    lists = [invented_words(list_size, rng) for _ in range(batch)]
    targets = torch.full((batch, U), SPACE, dtype=torch.long)
    lengths = torch.from_numpy(rng.integers(U // 2, U + 1, size=batch))
    for b in range(batch):
        fillers = invented_words(U // 3, rng)
        words = [lists[b][rng.integers(list_size)] if rng.random() < 0.3 else f for f in fillers]
        ids = encode(" ".join(words))[:U]
        targets[b, :len(ids)] = torch.tensor(ids)
        lengths[b] = min(int(lengths[b]), len(ids))
    trees = BatchedTrees([PrefixTree(words) for words in lists])
    training_cue(targets, lengths, trees)  # warm-up
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        training_cue(targets, lengths, trees)
        times.append(time.perf_counter() - t0)
    return 1000 * float(np.median(times))
