"""The default-corpus recipe: our own text, each voice's encoding, never an ARCTIC-derived voice."""

from __future__ import annotations

import pytest

from nenv.train import open_corpus


def test_no_voice_is_made_from_a_cmu_arctic_speaker():
    for voice, *_ in open_corpus.VOICES:
        assert not any(f in voice for f in open_corpus.FORBIDDEN)
    assert not any("slt" in v[3] for v in open_corpus.VOICES)


@pytest.mark.parametrize("lang, encoding", [("cs", "ISO-8859-2"), ("fi", "ISO-8859-1"), ("it", "ISO-8859-1"), ("en", "UTF-8")])
def test_sentences_are_reproducible_and_encodable(lang, encoding):
    a = open_corpus.sentences(lang, n=20, seed=3)
    assert a == open_corpus.sentences(lang, n=20, seed=3)
    assert a != open_corpus.sentences(lang, n=20, seed=4)
    for s in a:
        s.encode(encoding)  # a character the voice cannot read would render as noise
        assert s[-1] in ".?" and '"' not in s
        assert open_corpus.WORDS_PER_UTTERANCE[0] <= len(s.split()) < open_corpus.WORDS_PER_UTTERANCE[1]


def test_every_voice_names_its_licence():
    for voice, lang, enc, pkg, who, lic in open_corpus.VOICES:
        assert pkg.startswith("festvox-") and lic and who
