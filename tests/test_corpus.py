"""Corpus ingestion: scanning, speaker ids, the survey's exclusions, the speaker-disjoint split."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import soundfile as sf
from scipy import signal

from nenv.errors import ConfigError, InputError
from nenv.train import corpus, recipe
from tests.conftest import ARCTIC


@pytest.fixture(scope="module")
def speech():
    y, sr = sf.read(ARCTIC[0])
    assert sr == 16000
    return y


@pytest.fixture(scope="module")
def survey_corpus(tmp_path_factory, speech):
    """One clean file and one of each defect, each in its own speaker folder."""
    root = tmp_path_factory.mktemp("corpus")
    rng = np.random.default_rng(0)
    files = {}

    def put(name, y, sr=16000, subtype="PCM_16"):
        d = root / name
        d.mkdir()
        p = d / f"{name}.wav"
        sf.write(p, y, sr, subtype=subtype)
        files[name] = p

    put("clean", speech)
    put("clean44k", signal.resample_poly(speech, 441, 160), sr=44100)
    put("bandlimited", signal.sosfiltfilt(signal.ellip(10, 0.1, 80, 6000, fs=16000, output="sos"), speech))
    loud = speech / np.max(np.abs(speech)) * 3.0
    put("clipped", np.clip(loud, -0.999, 0.999))
    put("noisy", speech + 0.3 * np.std(speech) * rng.standard_normal(speech.size))
    put("short", speech[:1600])
    put("narrow", signal.resample_poly(speech, 1, 2), sr=8000)
    (root / "broken").mkdir()
    (root / "broken" / "broken.wav").write_bytes(b"RIFF\x10\x00\x00\x00WAVEfmt garbage")
    files["broken"] = root / "broken" / "broken.wav"
    stereo = np.stack([speech, speech], axis=1)
    put("stereo", stereo)
    return root, files


def test_scan_and_speaker_rules(tmp_path):
    for rel in ["a/s1/x.wav", "a/s1/y.flac", "a/s2/z.ogg", "a/s3/w.mp3", "a/s3/v.aiff", "b/notes.txt", "a/s1/._x.wav", "a/.trash/t.wav"]:
        p = tmp_path / rel
        p.parent.mkdir(parents=True, exist_ok=True)
        if p.suffix == ".txt" or p.name.startswith("._"):  # a macOS resource fork: hidden, skipped
            p.write_text("x")
        else:
            fmt, subtype = {".ogg": ("OGG", "VORBIS"), ".mp3": ("MP3", "MPEG_LAYER_III"), ".aiff": ("AIFF", None)}.get(p.suffix, (p.suffix[1:].upper(), None))
            sf.write(p, np.zeros(1600), 16000, format=fmt, subtype=subtype)
    found = corpus.scan(tmp_path)
    assert [Path(f.path).name for f in found] == ["x.wav", "y.flac", "z.ogg", "v.aiff", "w.mp3"]
    assert [f.speaker for f in found] == ["a/s1", "a/s1", "a/s2", "a/s3", "a/s3"]
    assert [f.speaker for f in corpus.scan(tmp_path, speaker_rule="depth:0")] == ["a"] * 5
    man = tmp_path / "m.csv"
    man.write_text("path,speaker\na/s1/x.wav,alice\na/s2/z.ogg,bob\n")
    assert [(f.speaker) for f in corpus.scan(tmp_path, manifest=str(man))] == ["alice", "bob"]
    with pytest.raises(InputError, match="no audio files"):
        corpus.scan(tmp_path / "b")
    with pytest.raises(InputError, match="does not exist"):
        corpus.scan(tmp_path / "missing")


def test_survey_excludes_each_defect_with_its_reason(survey_corpus):
    root, files = survey_corpus
    r = recipe.load(None)
    reports = {rep.speaker: rep for rep in corpus.survey(corpus.scan(root), r, workers=2)}
    assert reports["clean"].excluded == ""
    assert reports["clean44k"].excluded == ""  # the resampler's roll-off above 7.4 kHz is not a defect
    assert reports["stereo"].excluded == "" and reports["stereo"].channels == 2
    assert "band-limited" in reports["bandlimited"].excluded and 5500 <= reports["bandlimited"].cutoff_hz <= 6200
    assert "clipped" in reports["clipped"].excluded
    assert "noisy" in reports["noisy"].excluded
    assert "too little active speech" in reports["short"].excluded
    assert reports["narrow"].excluded.startswith("narrowband") and "below 16 kHz" in reports["narrow"].excluded
    assert reports["narrow"].duration_s > 0
    assert reports["broken"].excluded.startswith("unreadable")
    s = corpus.summary(list(reports.values()))
    assert s["files"] == 9 and s["kept_files"] == 3
    assert s["excluded_files"] == 6 and sum(s["exclusion_reasons"].values()) >= 6  # a file may have several
    # measures of the clean sentence, for sanity: speech is active about 2/3 of the time and its
    # high band lies 10-20 dB under the telephone band (CMU ARCTIC, read speech)
    assert 0.4 < reports["clean"].active_fraction < 0.9
    assert -20 < reports["clean"].hb_ratio_db < -10


def test_split_is_speaker_disjoint_and_reproducible():
    reps = [corpus.FileReport(path=f"{s}/{i}.wav", speaker=s) for s in "abcdefghij" for i in range(3)]
    tr, va = corpus.split_speakers(reps, val_fraction=0.2, seed=1)
    assert {r.speaker for r in tr}.isdisjoint({r.speaker for r in va})
    assert len({r.speaker for r in va}) == 2 and len(tr) + len(va) == 30
    tr2, va2 = corpus.split_speakers(reps, val_fraction=0.2, seed=1)
    assert [r.path for r in va2] == [r.path for r in va]
    picks = {frozenset(r.speaker for r in corpus.split_speakers(reps, val_fraction=0.2, seed=s)[1]) for s in range(6)}
    assert len(picks) > 1  # the seed decides the draw
    with pytest.raises(ConfigError, match="at least 2 speakers"):
        corpus.split_speakers(reps[:3], val_fraction=0.2, seed=0)


def test_named_speakers_go_where_the_recipe_says():
    reps = [corpus.FileReport(path=f"{s}/{i}.wav", speaker=s) for s in "abcdefghij" for i in range(3)]
    for seed in range(5):
        tr, va = corpus.split_speakers(reps, val_fraction=0.25, seed=seed, val_speakers=["a", "b"], train_speakers=["c", "d"])
        val = {r.speaker for r in va}
        assert {"a", "b"} <= val and not {"c", "d"} & val and {"c", "d"} <= {r.speaker for r in tr}
        assert len(val) == 2 + 2  # a quarter of the other six, rounded
    with pytest.raises(ConfigError, match="no kept file: zz"):
        corpus.split_speakers(reps, val_fraction=0.2, seed=0, val_speakers=["zz"])
    with pytest.raises(ConfigError, match="both"):
        corpus.split_speakers(reps, val_fraction=0.2, seed=0, val_speakers=["a"], train_speakers=["a"])


def test_the_same_recording_gives_the_same_training_pairs_wherever_it_lies(tmp_path):
    """Augmentation is seeded by the recording, not by its folder or file time: a corpus copied
    elsewhere trains the same model (seeding from the cache key, which holds both, did not)."""
    import os
    import shutil

    from nenv.chain.features import FeatureSettings
    from nenv.train import dataset

    rng = np.random.default_rng(3)
    y = signal.lfilter([1.0], [1.0, -0.9], rng.standard_normal(16000)) * 0.05
    (tmp_path / "a").mkdir()
    (tmp_path / "b" / "deeper").mkdir(parents=True)
    sf.write(tmp_path / "a" / "x.wav", y, 16000, subtype="PCM_16")
    shutil.copy(tmp_path / "a" / "x.wav", tmp_path / "b" / "deeper" / "y.wav")
    os.utime(tmp_path / "b" / "deeper" / "y.wav", ns=(1, 1))  # another modification time too
    r = recipe.load(None, overrides=["copies=2", "warp_max=1.15", "noise_probability=0.5"])
    s = FeatureSettings(context=r.context)
    one = dataset._file_pairs(str(tmp_path / "a" / "x.wav"), 0, r, s, None)
    two = dataset._file_pairs(str(tmp_path / "b" / "deeper" / "y.wav"), 5, r, s, None)
    assert one.x.shape[0] > 0
    np.testing.assert_array_equal(one.x, two.x)
    np.testing.assert_array_equal(one.level, two.level)
    other = dataset._file_pairs(str(tmp_path / "a" / "x.wav"), 0, recipe.load(None, overrides=["copies=2", "warp_max=1.15", "noise_probability=0.5", "seed=7"]), s, None)
    assert not np.array_equal(one.level, other.level)  # the recipe's seed still decides the draws
