"""Token inventory and text normalisation: the one place that says what a token is.

The inventory is characters: blank, the word boundary (space), the apostrophe
and the 26 lower-case letters. Blank is index 0 everywhere in the project
(model output, loss, decoding); the space token is the word boundary that the
prefix tree resets on.

This module deliberately knows nothing about audio or models.
"""

from __future__ import annotations

import re
from typing import Sequence

BLANK = 0
SPACE = 1
APOSTROPHE = 2
TOKENS: tuple[str, ...] = ("<blank>", " ", "'") + tuple("abcdefghijklmnopqrstuvwxyz")
VOCAB_SIZE = len(TOKENS)  # V, blank included
_INDEX = {ch: i for i, ch in enumerate(TOKENS) if i != BLANK}
_WHITE = re.compile(r"\s")  # the white space that normalize() folds (str.split and re agree on it)


class TokenError(ValueError):
    """A text holds a character outside the token inventory."""


def normalize(text: str) -> str:
    """Lower-case and fold runs of white space to one space.

    >>> normalize("  Call  Maren\\tOSKE ")
    'call maren oske'
    """
    return " ".join(text.lower().split())  # split() takes the white space of re's \s: a third of its time


def normalize_all(texts: Sequence[str]) -> list[str]:
    """normalize() of each text; a list of lower-case texts without white space (a biasing list's
    usual words) is checked in one pass instead of text by text.

    >>> normalize_all(["kell", "Maren  Oske"]), normalize_all(["kell", "mara"])
    (['kell', 'maren oske'], ['kell', 'mara'])
    """
    try:
        joined = "\x00".join(texts)
    except TypeError:  # not all strings: text by text, so the caller's checks name the entry
        return [normalize(t) for t in texts]
    if _WHITE.search(joined) is None and joined == joined.lower():
        return list(texts)
    return [normalize(t) for t in texts]


def check_text(text: str, where: str = "text") -> None:
    """Raise TokenError naming `where` and the first character not in the inventory.

    >>> check_text("dock at kell's pier")
    >>> check_text("pier 7", where="line 3")  # doctest: +IGNORE_EXCEPTION_DETAIL
    Traceback (most recent call last):
    ...
    tinyrnnt.text.TokenError: line 3: character '7' (position 5) is outside the token inventory (letters a-z, space, apostrophe)
    """
    for pos, ch in enumerate(text):
        if ch not in _INDEX:
            raise TokenError(
                f"{where}: character {ch!r} (position {pos}) is outside the token inventory "
                "(letters a-z, space, apostrophe)"
            )


def encode(text: str, where: str = "text") -> list[int]:
    """Normalised text -> token ids (no blank).

    >>> encode("go a")
    [9, 17, 1, 3]
    """
    text = normalize(text)
    check_text(text, where)
    return [_INDEX[ch] for ch in text]


def decode(ids) -> str:
    """Token ids -> text; blanks are skipped.

    >>> decode([9, 17, 0, 1, 3])
    'go a'
    """
    return "".join(TOKENS[int(i)] for i in ids if int(i) != BLANK)
