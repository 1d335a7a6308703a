"""The held-out evaluation set of real speech (tests/data/heldout): what it promises, checked."""

from __future__ import annotations

import csv
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf

from nenv.train.corpus import exclusions, measure
from nenv.train.recipe import Recipe
from tests.conftest import ARCTIC

HELDOUT = Path(__file__).parent / "data" / "heldout"


def _clips() -> list[dict]:
    with open(HELDOUT / "clips.csv", newline="", encoding="utf-8") as fh:
        return list(csv.DictReader(fh))


def test_many_speakers_both_groups_and_a_licence_each():
    rows = _clips()
    assert len({r["speaker"] for r in rows}) >= 10
    assert sum(r["group"] == "female" for r in rows) >= 4 and sum(r["group"] == "male" for r in rows) >= 4
    assert all(r["licence"] and r["source"] for r in rows)


@pytest.mark.parametrize("row", _clips(), ids=lambda r: r["clip"])
def test_every_clip_is_clean_wideband_speech_by_the_survey(row):
    """The same checks (and default thresholds) the training survey applies to a corpus file."""
    y, sr = sf.read(HELDOUT / f"{row['clip']}.flac")
    assert sr == 16000 and y.ndim == 1
    m = measure(y)
    r = Recipe()
    assert m["cutoff_hz"] >= r.min_cutoff_hz and m["snr_db"] >= r.min_snr_db and m["clipped_fraction"] <= r.max_clipped_fraction
    assert m["active_s"] >= 0.75
    assert exclusions(m, r, min_active_s=0.75) == []


def test_no_clip_comes_from_a_training_source():
    """The default corpus is built from klettres, fillets, ktuberling, megaglest and Festival; none of
    these sources may appear among the held-out clips (nor an ARCTIC voice in the corpus builder)."""
    from nenv.train import open_corpus

    for r in _clips():
        assert not any(k in r["source"].lower() for k in ("klettres", "fillets", "ktuberling", "megaglest", "festival"))
    assert not any(f in v[0] for v in open_corpus.VOICES for f in open_corpus.FORBIDDEN)


def test_the_true_band_beats_no_band_on_the_set_by_both_perceptual_measures():
    """The ceiling is visible on this set: the reference's own band (true-band) scores above the
    unextended signal on ViSQOL (speech mode) and WB-PESQ for most clips and on average."""
    from nenv.dsp import channel
    from nenv.report import measures
    from nenv.chain import pipeline
    from nenv.report.evaluate import prepare_reference

    gain_v, gain_p = [], []
    for r in _clips():
        ref = prepare_reference(HELDOUT / f"{r['clip']}.flac")
        nb = channel.telephone(ref, sr=16000, law="mulaw", level_dbov=None)
        base = pipeline.extend(nb, system=pipeline.make_system("unextended")).y
        top = pipeline.extend(nb, system=pipeline.make_system("true-band", reference=ref)).y
        gain_v.append(measures.visqol_speech(ref, top) - measures.visqol_speech(ref, base))
        gain_p.append(measures.pesq_wb(ref, top) - measures.pesq_wb(ref, base))
    assert np.mean(gain_v) > 0.3 and np.mean(np.array(gain_v) > 0) >= 0.8
    assert np.nanmean(gain_p) > 0.3


def test_groups_follow_the_source_label_or_the_median_f0_rule():
    """Per-group tables are only as right as the groups: a labelled speaker keeps its label (AMI ids
    begin with F or M; ARCTIC slt is female, bdl male); the others are female above F0_SPLIT_HZ (a rule
    of thumb), with the median F0 recorded as librosa's pYIN measures it again here (within 3 Hz)."""
    import re

    from nenv.train.heldout import F0_SPLIT_HZ, median_f0

    for r in _clips():
        if r["group_from"] == "source label":
            label = {"F": "female", "M": "male"}.get(r["speaker"].split("/")[1][0], {"slt": "female", "bdl": "male"}.get(r["speaker"].split("/")[1]))
            assert r["group"] == label, r
            continue
        recorded = float(re.fullmatch(r"median F0 (\d+) Hz", r["group_from"]).group(1))
        y, _ = sf.read(HELDOUT / f"{r['clip']}.flac")
        f0 = median_f0(y)
        assert abs(f0 - recorded) <= 3 and r["group"] == ("female" if f0 > F0_SPLIT_HZ else "male"), (r["clip"], f0)


def test_the_groups_file_is_read_as_its_header_says(tmp_path):
    """read_groups: columns found by the header in any order, other columns ignored, spaces trimmed,
    a row without a group left out (its clip then counts in no group), the set's own clips.csv read
    as is; a file without both columns refused."""
    from nenv.errors import InputError
    from nenv.report.evaluate import group_of, read_groups

    p = tmp_path / "g.csv"
    p.write_text("speaker,group,clip\ns1, female ,a0007\ns2,,a0009\ns3,male,calls/b12\n")
    g = read_groups(p)
    assert g == {"a0007": "female", "calls/b12": "male"}
    assert group_of("a0007", g) == "female" and group_of("a0009", g) is None and group_of("other/calls/b12", g) is None
    assert group_of("x/b12", {"b12": "male"}) == "male"  # else the clip's last path part
    p.write_text("clip,group\na0007,female\n")  # just the two columns
    assert read_groups(p) == {"a0007": "female"}
    sets = read_groups(HELDOUT / "clips.csv")
    assert {r["clip"]: r["group"] for r in _clips()} == sets
    for text in ("clip,speaker\na0007,s1\n", "clip,group\n", ""):
        p.write_text(text)
        with pytest.raises(InputError, match="columns clip and group"):
            read_groups(p)


def test_means_per_system_and_per_group_are_the_plain_means_of_their_clips():
    """evaluate.means against numpy means of hand-picked clips: each (law, system) over all its clips,
    then each group's, a clip outside every group under "(no group)"; NaN left out of a mean."""
    from dataclasses import fields

    from nenv.report.evaluate import Row, means
    from nenv.report.measures import Scores

    names = [f.name for f in fields(Scores)]

    def sc(v):
        return Scores(**{m: float(v) for m in names})

    values = {("a", "neural"): 1.0, ("b", "neural"): 2.0, ("c", "neural"): 6.0, ("d", "neural"): np.nan,
              ("a", "codebook"): 10.0, ("b", "codebook"): 20.0, ("c", "codebook"): 30.0, ("d", "codebook"): 40.0}
    rows = [Row(clip, "mulaw", system, sc(v)) for (clip, system), v in values.items()]
    groups = {"a": "female", "b": "male", "c": "female"}  # d is in no group
    got = {(r.clip, r.system): r.scores.lsd_high for r in means(rows, groups)}
    want = {("mean", "neural"): 3.0, ("mean female", "neural"): 3.5, ("mean male", "neural"): 2.0, ("mean (no group)", "neural"): np.nan,
            ("mean", "codebook"): 25.0, ("mean female", "codebook"): 20.0, ("mean male", "codebook"): 20.0, ("mean (no group)", "codebook"): 40.0}
    assert set(got) == set(want)
    for k, v in want.items():
        assert (np.isnan(got[k]) and np.isnan(v)) or got[k] == v, k
    assert [r.clip for r in means(rows)] == ["mean", "mean"]  # without groups: one mean per system


def _rttm(path: Path, uri: str, turns: list[tuple[float, float, str]], extra: str = "") -> None:
    """An RTTM file (NIST's rich transcription format: SPEAKER uri channel onset duration <NA> <NA> name <NA> <NA>)."""
    lines = [f"SPEAKER {uri} 1 {t0:.3f} {dur:.3f} <NA> <NA> {who} <NA> <NA>" for t0, dur, who in turns]
    path.write_text("\n".join(lines) + "\n" + extra, encoding="utf-8")


def test_meeting_turns_keep_one_unoverlapped_stretch_per_speaker_worked_by_hand(tmp_path, monkeypatch):
    """The builder's reading of the meeting excerpts, against turns worked out by hand: each speaker's
    longest turn with every other speaker's overlap cut away (the longer side kept when another speaker
    talks inside it), the next turn tried when that leaves under MIN_TURN_S, at most MAX_CLIP_S, the
    group from the speaker id's first letter; an RTTM without its audio file gives nothing."""
    from nenv.train import heldout

    assert heldout.MIN_TURN_S == 2.5 and heldout.MAX_CLIP_S == 8.0  # the worked numbers below assume these
    monkeypatch.setattr(heldout, "CODEC2_FILES", ())
    data = tmp_path / "pyannote_audio-4.0.7" / "tests" / "data"
    data.mkdir(parents=True)
    _rttm(data / "m1.rttm", "m1", [
        (0.0, 5.0, "FEE001"),   # 0-5, MEO002 from 4: 0-4
        (4.0, 2.0, "MEO002"),
        (7.0, 10.0, "MEO002"),  # 7-17, FEE001 inside at 9-10: the longer side 10-17 (7 s)
        (9.0, 1.0, "FEE001"),
        (20.0, 2.0, "FEO003"),  # 2 s: too short, no other turn
        (30.0, 2.5, "MEE005"),  # exactly MIN_TURN_S: kept
        (40.0, 4.0, "MEO006"),  # 40-44 with MEE007 at 41-43: 1 s either side, too short ...
        (41.0, 2.0, "MEE007"),
        (50.0, 3.0, "MEO006"),  # ... so its next turn, 50-53
        (60.0, 12.0, "FEE008"),  # 60-72: cut to MAX_CLIP_S
    ], extra="SPKR-INFO m1 1 <NA> <NA> <NA> unknown FEE001 <NA> <NA>\nSPEAKER m1 1 80.0\n")
    (data / "m1.wav").write_bytes(b"")
    _rttm(data / "gone.rttm", "gone", [(0.0, 9.0, "FEE009")])  # no gone.wav
    ami = [c for c in heldout.candidates(tmp_path) if c.name.startswith("ami_")]
    assert [(c.name, c.start_s, c.stop_s, c.speaker, c.group) for c in ami] == [
        ("ami_fee008", 60.0, 68.0, "ami/FEE008", "female"),
        ("ami_meo002", 10.0, 17.0, "ami/MEO002", "male"),
        ("ami_fee001", 0.0, 4.0, "ami/FEE001", "female"),
        ("ami_meo006", 50.0, 53.0, "ami/MEO006", "male"),
        ("ami_mee005", 30.0, 32.5, "ami/MEE005", "male"),
    ]
    assert all(c.path == str(data / "m1.wav") and c.licence == "CC-BY-4.0" for c in ami)


def test_candidates_are_found_in_each_source_tree_and_nothing_else(tmp_path, monkeypatch):
    from nenv.train import heldout

    codec2 = tmp_path / "codec2.wav"
    codec2.write_bytes(b"")
    monkeypatch.setattr(heldout, "CODEC2_FILES", ((codec2, "codec2/speech_orig"), (tmp_path / "absent.wav", "codec2/wia")))
    assert [c.name for c in heldout.candidates(tmp_path / "empty")] == ["arctic_a0007", "arctic_a0009", "codec2_speech_orig"]
    ps = tmp_path / "pocketsphinx-5.1.1" / "test" / "data"
    for f in ("librivox/a.wav", "librivox/b.wav", "forever/input_2_16k.wav", "cards/001.wav", "cards/002.wav", "forever/input_3_16k.wav"):
        (ps / f).parent.mkdir(parents=True, exist_ok=True)
        (ps / f).write_bytes(b"")
    pm = tmp_path / "praat_parselmouth-0.4.7" / "tests" / "data"
    pm.mkdir(parents=True)
    (pm / "the_north_wind_and_the_sun.wav").write_bytes(b"")
    found = {c.name: c for c in heldout.candidates(tmp_path)}
    assert sorted(found) == sorted(["arctic_a0007", "arctic_a0009", "librivox_austen", "ps_forever_2", "ps_cards", "parselmouth_north_wind", "codec2_speech_orig"])
    assert found["librivox_austen"].path.endswith("b.wav") and found["ps_cards"].path.endswith("002.wav")  # the last of each folder
    assert all((c.start_s, c.stop_s) == (0, 0) for c in found.values())  # whole files (build cuts them at MAX_CLIP_S)
    assert found["arctic_a0009"].group == "female" and found["arctic_a0007"].group == "male" and found["ps_cards"].group == ""  # no label: F0 decides


def test_the_builder_cuts_checks_and_writes_each_clip_and_lists_what_it_excluded(tmp_path, monkeypatch):
    """build() on a meeting excerpt made of real speech (the ARCTIC bdl sentence) followed by silence:
    the speech turn is cut sample-exactly and written, the silent one excluded by the survey with its
    reason, the two ARCTIC sentences kept whole with their labelled groups."""
    from nenv.train import heldout

    monkeypatch.setattr(heldout, "CODEC2_FILES", ())
    speech, sr = sf.read(ARCTIC[0])  # arctic_a0007
    assert sr == 16000
    data = tmp_path / "src" / "pyannote_audio-4.0.7" / "tests" / "data"
    data.mkdir(parents=True)
    y = np.concatenate([speech, np.zeros(4 * sr)])
    sf.write(data / "m1.wav", y, sr, subtype="PCM_16")
    _rttm(data / "m1.rttm", "m1", [(0.25, 2.75, "MEE001"), (4.5, 3.0, "FEO002")])
    rows = heldout.build(tmp_path / "src", tmp_path / "out")
    assert [r["clip"] for r in rows] == ["arctic_a0007", "arctic_a0009", "ami_mee001"]
    assert [r["group_from"] for r in rows] == ["source label"] * 3 and [r["group"] for r in rows] == ["male", "female", "male"]
    cut, cut_sr = sf.read(tmp_path / "out" / "ami_mee001.flac")
    assert cut_sr == 16000 and cut.size == int(2.75 * sr)
    np.testing.assert_allclose(cut, sf.read(data / "m1.wav")[0][4000 : 4000 + cut.size], atol=1 / 32768)  # 0.25 s in, FLAC of 16-bit samples
    for src in ARCTIC:  # whole sentences, sample for sample
        np.testing.assert_array_equal(sf.read(tmp_path / "out" / f"{src.stem}.flac")[0], sf.read(src)[0])
    with open(tmp_path / "out" / "clips.csv", newline="", encoding="utf-8") as fh:
        assert [r["clip"] for r in csv.DictReader(fh)] == ["arctic_a0007", "arctic_a0009", "ami_mee001"]
    with open(tmp_path / "out" / "excluded.csv", newline="", encoding="utf-8") as fh:
        excluded = list(csv.DictReader(fh))
    assert [r["clip"] for r in excluded] == ["ami_feo002"] and "active" in excluded[0]["excluded"]
    assert not (tmp_path / "out" / "ami_feo002.flac").exists()
