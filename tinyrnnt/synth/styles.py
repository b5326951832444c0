"""Name styles: invented orthographies, each its own syllables and spelling rules.

A style maps syllable sounds (ARPAbet, stress left out) to the spellings that
sound alike in that style, plus unstressed endings. Real rare names often
follow another language's conventions (letter groups, doubled and silent
letters) that a recognizer's own spelling habits never produce from sound;
the styles model that. `plain` writes names the way English spells sounds;
`fell` uses doubled consonants and letter groups ("ff", "ll", "dd", "rh",
"gw", "y" as a vowel); `reed` uses letter groups none of the others writes
("sz", "cz", "cs", "zs", "q", "ij", "ii", "w" for V). A corpus holds one or
more styles out of training text entirely, so their spellings can only come
from the biasing list.

The spellings are invented for this project (no real orthography is copied
letter for letter); only their general shape follows common practice.
"""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class NameStyle:
    name: str
    syllables: dict[str, tuple[str, ...]]  # phones -> spellings that sound alike
    endings: dict[str, tuple[str, ...]]


PLAIN = NameStyle(
    "plain",
    syllables={
        "K AE L": ("cal", "kal"), "K EH N": ("ken", "kenn"), "K OW": ("co", "ko"), "K IY": ("kee", "kea"),
        "K ER": ("ker", "kir", "cur"), "M EY": ("may", "mae", "mai"), "M ER": ("mer", "mur", "myr"),
        "M IH L": ("mil", "myl"), "L IY": ("lee", "lea", "leigh"), "L OW": ("lo", "loe"),
        "L IH N": ("lin", "lyn", "linn"), "R OW": ("ro", "roe", "rho"), "R IH N": ("rin", "ryn"),
        "D AA": ("da", "dah"), "D EH L": ("del", "dell"), "D AY": ("di", "dy"),
        "F EH N": ("fen", "phen", "fenn"), "F AY": ("fy", "phy"), "F IH N": ("fin", "fyn", "phin"),
        "S IY": ("see", "sea", "cie"), "S AY": ("sy", "cy"), "S EH L": ("sel", "cel"),
        "T AE": ("ta", "tah"), "T ER": ("ter", "tur", "tir"), "T IY": ("tee", "tea"),
        "B R IH": ("bri", "bry"), "N EY": ("nay", "nae", "nei"), "N OW": ("no", "noe"),
        "V AE L": ("val", "vahl"), "V IH": ("vi", "vy"), "W IH N": ("win", "wyn", "whin"),
        "HH AA L": ("hal", "hahl"), "JH EH N": ("jen", "gen"), "JH OW": ("jo", "joe"),
        "SH AY": ("shy", "shai"), "AA R": ("ar", "arr"), "AO R": ("or", "orr", "aur"),
        "V ER": ("ver", "vir", "vur"), "G R EY": ("gray", "grey", "grae"), "TH AO R": ("thor", "thorr"),
    },
    endings={
        "AH": ("a", "ah"), "IY": ("y", "ie", "ey"), "OW": ("o", "oe"), "AH N": ("an", "en", "on"),
        "ER": ("er", "ar", "or"), "IH K": ("ic", "ick", "ik"), "AH S": ("us", "as"), "IH N": ("in", "yn"),
        "EH T": ("et", "ette"),
    },
)

FELL = NameStyle(
    "fell",
    syllables={
        "F EH L": ("ffel", "ffell"), "L AA N": ("llan", "lhan"), "K AE R": ("caer", "kaer"),
        "G W IH N": ("gwyn", "gwin"), "R IY": ("rhi", "rhy"), "M AW R": ("mawr", "maur"),
        "DH IH": ("ddy", "ddi"), "B R AH N": ("bryn", "brynn"), "G L IH N": ("glyn", "gllyn"),
        "K UH M": ("cwm", "cwmm"), "P EH N": ("penn", "phenn"), "L AH N": ("llyn", "lhyn"),
        "TH AH R": ("thyr", "thwr"), "M AH N": ("mynn", "myn"), "F AA N": ("ffan", "ffann"),
        "T R AH W": ("trw", "trwy"), "HH W EH L": ("chwel", "chwell"), "D AH L": ("dyl", "dyll"),
    },
    endings={
        "IY": ("i", "y"), "AH N": ("yn", "wn"), "AW": ("aw", "au"), "IH DH": ("ydd", "idd"),
        "AH S": ("ys", "ws"), "EH D": ("edd", "ed"),
    },
)

REED = NameStyle(
    "reed",
    syllables={
        "SH IH": ("szy", "sci"), "CH EH": ("cze", "cse"), "S AA": ("ssa", "sza"), "ZH OW": ("zso", "zho"),
        "K AA": ("qa", "kka"), "K EH": ("qe", "kke"), "V OW": ("wo", "vvo"), "V IH": ("wi", "vvi"),
        "JH AA": ("dzsa", "gya"), "CH IH": ("csi", "czy"), "M IY": ("mii", "mij"), "L IY": ("lii", "lij"),
        "T IY": ("tii", "tij"), "R AA": ("rra", "rha"), "B OW": ("bou", "boou"), "K AA SH": ("qasz", "kkacz"),
        "M EH SH": ("mesz", "mecz"), "T AA CH": ("tacs", "tacz"),
    },
    endings={
        "N AH": ("na", "nna"), "K AH": ("ka", "qa"), "SH IY": ("szij", "szii"), "CH AH": ("cza", "csa"),
        "V AH": ("wa", "vva"), "N IY": ("nij", "nii"), "AH SH": ("asz", "acz"), "IH K": ("ycz", "yq"),
    },
)

STYLES: dict[str, NameStyle] = {s.name: s for s in (PLAIN, FELL, REED)}


def style(name: str) -> NameStyle:
    if name not in STYLES:
        from tinyrnnt.config import ConfigError

        raise ConfigError(f"unknown name style {name!r}; styles: {sorted(STYLES)}")
    return STYLES[name]
