"""Scoring recordings that already exist (``nenv measures``): pairing, alignment in time and level, and
agreement with ``nenv evaluate`` where both apply."""

from __future__ import annotations

import csv
import re

import numpy as np
import pytest
import soundfile as sf
from typer.testing import CliRunner

from nenv.cli import app
from nenv.report import lineup, pairs, telband
from tests.conftest import ARCTIC

runner = CliRunner()


def _run(*args):
    return runner.invoke(app, [str(a) for a in args], catch_exceptions=False)


@pytest.fixture(scope="module")
def extended():
    """The first ARCTIC sentence at -26 dBov, and the shipped model's output for it through G.711 mu-law,
    as ``nenv evaluate`` makes them (aligned with the reference by construction)."""
    from nenv.chain import pipeline
    from nenv.dsp import channel
    from nenv.report.evaluate import prepare_reference

    ref = prepare_reference(ARCTIC[0])
    nb = channel.telephone(ref, sr=16000, law="mulaw", level_dbov=None)
    y = pipeline.extend(nb, system=pipeline.make_system("neural", model=pipeline.load_model(None))).y
    return ref, nb, y


def _shifted(y, offset, gain_db):
    """``y`` made ``offset`` samples late (negative: its start cut off) and ``gain_db`` louder."""
    y = np.concatenate([np.zeros(offset), y]) if offset >= 0 else y[-offset:]
    return y * 10 ** (gain_db / 20)


@pytest.mark.parametrize(("offset", "gain_db"), [(0, 0.0), (600, -12.0), (-300, 6.0), (16000, -3.0), (-8000, -20.0)])
def test_alignment_finds_a_known_offset_and_level(extended, offset, gain_db):
    # The truth is made here: the same output, delayed (or cut) by a known number of samples and scaled.
    ref, _, y = extended
    base = lineup.align(ref, y)
    assert base.offset == 0 and abs(base.gain_db) < 0.1 and base.correlation > 0.99  # G.711 and the added band change little
    a = lineup.align(ref, _shifted(y, offset, gain_db))
    assert a.offset == offset
    assert a.gain_db == pytest.approx(base.gain_db + gain_db, abs=0.02)
    assert a.correlation > 0.9  # normalised by the whole signals' energies: a cut start lowers it a little


def test_short_pairs_are_aligned_without_a_drift_and_a_tiny_overlap_is_no_match(extended):
    ref, _, y = extended
    assert ref.size < lineup.DRIFT_MIN_S * 16000  # the 4 s sentence: too short to tell a drift
    a = lineup.align(ref, y)
    assert a.drift_ms is None and a.rate_ppm is None and a.offset == 0
    tiny = lineup.align(ref, y[: lineup.LEVEL_BLOCK - 1])  # under one 20 ms level block in common
    assert (tiny.gain_db, tiny.correlation, tiny.pieces) == (0.0, 0.0, ())


def test_an_offset_outside_the_search_range_is_not_found(extended):
    ref, _, y = extended
    a = lineup.align(ref, _shifted(y, 16000, 0.0), max_offset_s=0.5)
    assert a.offset != 16000 and a.correlation < lineup.MIN_CORRELATION  # refused, not misaligned quietly


@pytest.mark.parametrize(("offset", "gain_db", "ref_gain_db"), [(600, -12.0, 0.0), (16000, -3.0, 9.0)])
def test_an_aligned_pair_scores_as_evaluate_scores_it(extended, tmp_path, offset, gain_db, ref_gain_db):
    """Late, softer or louder files give the scores ``nenv evaluate`` gives the aligned pair at its level
    (ViSQOL included, whose verdict depends on the absolute level: the pair is brought to -26 dBov)."""
    from nenv.report.measures import Scores

    ref, _, y = extended
    want = Scores.compute(ref, y)
    sf.write(tmp_path / "ref.wav", ref * 10 ** (ref_gain_db / 20), 16000, subtype="FLOAT")
    sf.write(tmp_path / "out.wav", _shifted(y, offset, gain_db), 16000, subtype="FLOAT")
    got = pairs.score(pairs.Pair("ref", "out", tmp_path / "out.wav", tmp_path / "ref.wav"))
    assert got.error is None and got.alignment.offset == offset
    for m in ("lsd_high", "lsd_full", "lsd_env_high", "level_error_high", "lsd_low"):  # within the unshifted pair's own gain (0.03 dB)
        assert getattr(got.scores, m) == pytest.approx(getattr(want, m), abs=0.05), m
    assert got.scores.pesq_wb == pytest.approx(want.pesq_wb, abs=0.02)
    assert got.scores.visqol == pytest.approx(want.visqol, abs=0.02)


def test_visqol_depends_on_the_absolute_level_so_pairs_are_scored_at_one():
    """Why the pair is brought to -26 dBov: ViSQOL's gammatone spectrograms have an absolute floor
    (-45 dB in visqol-python's gammatone.py, as in the reference implementation), so the same pair
    scores differently when both signals are 9 dB louder. WB-PESQ aligns the level itself
    (ITU-T P.862) and does not move."""
    from nenv.chain import pipeline
    from nenv.dsp import channel
    from nenv.report import measures
    from nenv.report.evaluate import prepare_reference

    ref = prepare_reference(ARCTIC[1])
    y = pipeline.extend(channel.telephone(ref, sr=16000, law="mulaw", level_dbov=None), system=pipeline.make_system("imaging")).y
    k = 10 ** (9 / 20)
    assert abs(measures.visqol_speech(ref * k, y * k) - measures.visqol_speech(ref, y)) > 0.1
    assert measures.pesq_wb(ref * k, y * k) == pytest.approx(measures.pesq_wb(ref, y), abs=0.01)


def test_other_speech_is_refused_with_the_reason(extended, tmp_path):
    from nenv.report.evaluate import prepare_reference

    _, _, y = extended
    sf.write(tmp_path / "other.wav", prepare_reference(ARCTIC[1]), 16000)
    sf.write(tmp_path / "out.wav", y, 16000)
    got = pairs.score(pairs.Pair("other", "out", tmp_path / "out.wav", tmp_path / "other.wav"))
    assert got.scores is None and "no common speech" in got.error


def test_clock_drift_is_measured_and_reported(extended, tmp_path):
    # Two recorders whose clocks differ by 400 ppm: over 8 s the output slips by about 3 ms.
    from scipy import signal

    ref, _, y = extended
    ref2, y2 = np.concatenate([ref, ref]), np.concatenate([y, y])
    drifted = signal.resample_poly(y2, 2501, 2500)  # 400 ppm more samples: the output runs late, more and more
    a = lineup.align(ref2, drifted)
    assert a.correlation > 0.9  # one-second segments still match
    assert 1.5 < a.drift_ms < 3.3  # 400 ppm between the first and last thirds' segments, 4-7 s apart
    assert a.rate_ppm == pytest.approx(400, abs=40)
    assert abs(lineup.align(ref2, np.concatenate([y, y])).drift_ms) < 0.2
    sf.write(tmp_path / "ref.wav", ref2, 16000)
    sf.write(tmp_path / "out.wav", drifted, 16000)
    got = pairs.score(pairs.Pair("ref", "out", tmp_path / "out.wav", tmp_path / "ref.wav"))
    said = [n for n in got.notes if "resampled" in n]
    assert got.error is None and len(said) == 1 and abs(float(said[0].split("drifts ")[1].split(" ppm")[0]) - 400) < 40, got
    assert abs(got.alignment.drift_ms) < 0.5  # what is scored is the resampled output
    assert not any("drifts" in n for n in pairs.score(pairs.Pair("ref", "y", tmp_path / "ref.wav", tmp_path / "ref.wav")).notes)


@pytest.mark.parametrize("ppm", [1000, 2000])
def test_a_drifting_clock_is_undone_before_scoring(extended, tmp_path, ppm):
    """41 s of the sentence and pauses, the output's clock running 1000 or 2000 ppm long (41 or 82 ms
    by the end; a drift that made the pair unscorable, 'no common speech', before resampling): the
    rate is found within 2% and the scores are those of the same output without drift."""
    from scipy import signal

    ref, _, y = extended
    gap = np.zeros(16000)
    r, o = np.concatenate([ref, gap] * 8), np.concatenate([y, gap] * 8)
    sf.write(tmp_path / "ref.wav", r, 16000)
    sf.write(tmp_path / "same.wav", np.concatenate([np.zeros(1234), o]), 16000)
    sf.write(tmp_path / "late.wav", np.concatenate([np.zeros(1234), signal.resample(o, round(o.size * (1 + ppm * 1e-6)))]), 16000)
    same = pairs.score(pairs.Pair("ref", "same", tmp_path / "same.wav", tmp_path / "ref.wav"))
    late = pairs.score(pairs.Pair("ref", "late", tmp_path / "late.wav", tmp_path / "ref.wav"))
    assert late.error is None, late.error
    said = [n for n in late.notes if "resampled" in n]
    assert len(said) == 1 and abs(float(said[0].split("drifts ")[1].split(" ppm")[0]) - ppm) < 0.02 * ppm, late.notes
    assert late.alignment.offset == pytest.approx(1234, abs=3) and abs(late.alignment.drift_ms) <= 1.0
    assert late.clock_ppm == pytest.approx(ppm, rel=0.02) and same.clock_ppm == 0
    assert f"{late.clock_ppm:.1f}" in pairs.to_csv([same, late], []) and f"| {late.clock_ppm:+.0f} |" in pairs.to_markdown([same, late], [])
    assert late.scores.lsd_high == pytest.approx(same.scores.lsd_high, abs=0.1)
    assert late.scores.visqol == pytest.approx(same.scores.visqol, abs=0.05)
    assert late.scores.pesq_wb == pytest.approx(same.scores.pesq_wb, abs=0.05)


@pytest.fixture
def folders(extended, tmp_path):
    """A reference folder with groups, the narrowband input (8 kHz) and an output folder with one clip
    missing and one file without a reference."""
    from nenv.report.evaluate import prepare_reference

    ref, nb, y = extended
    ref2 = prepare_reference(ARCTIC[1])
    for sub in ("ref/m", "ref/f", "nb/m", "sys/m", "sys/f"):
        (tmp_path / sub).mkdir(parents=True)
    sf.write(tmp_path / "ref/m/a0007.flac", ref, 16000)
    sf.write(tmp_path / "ref/f/a0009.flac", ref2, 16000)
    sf.write(tmp_path / "nb/m/a0007.wav", nb, 8000)
    sf.write(tmp_path / "sys/m/a0007.wav", _shifted(y, 400, -6.0), 16000)
    sf.write(tmp_path / "sys/f/extra.wav", y, 16000)
    (tmp_path / "groups.csv").write_text("clip,group\nm/a0007,male\nf/a0009,female\n")
    return tmp_path


def test_measures_command_pairs_folders_and_reports_groups(folders):
    res = _run("measures", folders / "nb", folders / "sys", "--reference", folders / "ref", "--groups", folders / "groups.csv", "--out", folders / "t")
    assert res.exit_code == 0, res.output
    assert "8 kHz: scored as the unextended input" in res.stderr
    assert "1 file in" in res.stderr and "has no reference and is not scored (first: f/extra)" in res.stderr
    assert "lacks 1 reference clip (first: f/a0009)" in res.stderr  # nb/ and sys/ have no f/a0009
    rows = list(csv.DictReader(open(folders / "t" / "table.csv")))
    scored = {(r["clip"], r["output"]): r for r in rows if not r["clip"].startswith("mean")}
    assert set(scored) == {("m/a0007", str(folders / "nb")), ("m/a0007", str(folders / "sys"))}
    assert float(scored["m/a0007", str(folders / "sys")]["offset_ms"]) == pytest.approx(25.0)  # 400 samples at 16 kHz
    assert float(scored["m/a0007", str(folders / "sys")]["gain_db"]) == pytest.approx(-6.0, abs=0.1)
    assert all(r["group"] == "male" for r in scored.values())
    means = [(r["output"], r["group"]) for r in rows if r["clip"].startswith("mean")]
    assert means == [(str(folders / "nb"), ""), (str(folders / "nb"), "male"), (str(folders / "sys"), ""), (str(folders / "sys"), "male")]
    # the extension adds a band the unextended input lacks: its high-band level is far nearer the reference's
    hb = {o: float(r["level_error_high"]) for (_, o), r in scored.items()}
    assert hb[str(folders / "nb")] < hb[str(folders / "sys")] - 6
    table = (folders / "t" / "table.md").read_text()
    assert table.count("**mean") == 4 and table.count("**mean male**") == 2  # each output's mean over all clips, and over the male group's
    assert not (folders / "t" / "alignment.png").exists()  # one offset and one gain served every pair: nothing to draw


def test_measures_command_goes_on_past_a_pair_it_cannot_score(folders):
    sf.write(folders / "sys/m/a0007.wav", np.zeros(16000), 16000)  # silence: nothing to score
    res = _run("measures", folders / "nb", folders / "sys", "--reference", folders / "ref")
    assert res.exit_code == 1
    assert "nenv: failed:" in res.stderr and "digital silence" in res.stderr
    assert "| m/a0007 |" in res.stdout  # the input was still scored


@pytest.mark.parametrize(
    ("args", "needle"),
    [
        (["sys/m/a0007.wav", "--reference", "ref"], "a reference folder pairs with output folders"),
        (["sys", "--reference", "missing"], "does not exist"),
        (["sys/f", "--reference", "ref"], "has a counterpart"),
        (["sys", "--reference", "ref", "--groups", "ref/m/a0007.flac"], "groups file"),
        (["sys", "--reference", "ref", "--max-offset-s", "0"], "0.01"),
    ],
)
def test_measures_command_refuses_what_it_cannot_pair(folders, monkeypatch, args, needle):
    monkeypatch.chdir(folders)
    res = _run("measures", *args)
    assert res.exit_code == 2 and needle in res.output, res.output


def test_same_speech_is_told_from_other_speech_on_the_heldout_set():
    """The refusal threshold, checked on real recordings (tests/data/heldout, 13 clips, 12 speakers):
    each clip through a noisy A-law channel (20 dB SNR) matches its own reference well above
    MIN_CORRELATION, and every other clip stays well below it."""
    from pathlib import Path

    from nenv.dsp import channel
    from nenv.media import audio
    from nenv.report.evaluate import prepare_reference

    clips = sorted((Path(__file__).parent / "data" / "heldout").glob("*.flac"))
    refs = [prepare_reference(p) for p in clips]
    outs = [audio.resample(channel.telephone(r, sr=16000, law="alaw", level_dbov=None, snr_db=20, seed=i), orig_sr=8000, target_sr=16000) for i, r in enumerate(refs)]
    found = [lineup.align(r, o) for r, o in zip(refs, outs)]
    same = [a.correlation for a in found]
    other = [lineup.align(refs[i], outs[j]).correlation for i in range(len(refs)) for j in range(len(refs)) if i != j]
    assert min(same) > lineup.MIN_CORRELATION + 0.15, same  # measured: 0.69-0.99
    assert max(other) < lineup.MIN_CORRELATION - 0.1, max(other)  # measured: at most 0.34 (0.30 with +-20 ms segment lags)
    # nothing to undo where nothing happened: no jump, and the channel's noise is not taken for a moving level
    # (measured: without the noise floors taken out, 3 of these clips at 10 dB SNR were; with them none at 20, 10 or 5 dB)
    assert not any(a.pieces for a in found)
    assert all(telband.level_track(*lineup.splice(r, o, a)) is None for r, o, a in zip(refs, outs, found))


@pytest.mark.parametrize("offset", [0, 5, -7])
def test_overlap_cuts_both_to_the_same_time(offset):
    ref = np.arange(100.0)
    out = np.concatenate([np.full(offset, -1.0), ref]) if offset >= 0 else ref[-offset:]  # sample i of the reference at i + offset
    r, o = lineup.overlap(ref, out, offset)
    np.testing.assert_array_equal(r, o)
    assert r.size == 100 - max(0, -offset)



def _jittered(o, cuts):
    """``o`` with playout adjustments: at each (sample, d), d > 0 zeros inserted, d < 0 samples dropped."""
    parts, prev = [], 0
    for at, d in cuts:
        parts.append(o[prev:at])
        if d > 0:
            parts.append(np.zeros(d))
            prev = at
        else:
            prev = at - d
    return np.concatenate(parts + [o[prev:]])


def test_splice_joins_the_pieces_that_hold_the_same_samples():
    """An output made from the reference by inserting 7 samples at 300 and dropping 5 at 600, 20 samples
    late: the spliced pair is the same samples on both sides, the 5 the output lacks cut from the reference."""
    rng = np.random.default_rng(0)
    ref = rng.standard_normal(1000)
    out = np.concatenate([np.zeros(20), _jittered(ref, [(300, 7), (600, -5)])])
    a = lineup.Alignment(20, 0.0, 1.0, pieces=((0, 20), (300, 27), (600, 22)))  # a piece starts where the last one stops holding
    r, o = lineup.splice(ref, out, a)
    np.testing.assert_array_equal(r, o)
    assert r.size == 1000 - 5 and a.jumps == [(300, 7), (600, -5)]
    np.testing.assert_array_equal(lineup.splice(ref, out[:900], lineup.Alignment(20, 0.0, 1.0))[0], ref[:880])  # no pieces: overlap


@pytest.mark.parametrize("ppm", [0, 1000])
def test_jumps_of_the_offset_are_undone_before_scoring(extended, tmp_path, ppm):
    """20 s of the sentence and pauses through a jitter buffer that adds 20 ms inside speech, drops 10 ms
    and adds 50 ms (with and without a drifting clock): each jump's size is found to the sample and its
    place within 1 ms, and the scores are those of the same output played out evenly. Before, the jumps were
    taken for a drift of some 1800 ppm: LSD +0.5 dB, ViSQOL -0.14 and WB-PESQ not measurable."""
    from scipy import signal

    ref, _, y = extended
    gap = np.zeros(16000)
    r, o = np.concatenate([ref, gap] * 4), np.concatenate([y, gap] * 4)
    cuts = [(24000, 320), (115200, -160), (212800, 800)]  # inside speech: 1.5 s, 7.2 s, 13.3 s
    late = np.concatenate([np.zeros(1234), _jittered(o, cuts)])
    if ppm:
        late = signal.resample(late, round(late.size * (1 + ppm * 1e-6)))
    sf.write(tmp_path / "ref.wav", r, 16000)
    sf.write(tmp_path / "same.wav", np.concatenate([np.zeros(1234), o]), 16000)
    sf.write(tmp_path / "late.wav", late, 16000)
    same = pairs.score(pairs.Pair("ref", "same", tmp_path / "same.wav", tmp_path / "ref.wav"))
    got = pairs.score(pairs.Pair("ref", "late", tmp_path / "late.wav", tmp_path / "ref.wav"))
    assert got.error is None, got.error
    assert len(got.alignment.jumps) == len(cuts) and not same.alignment.pieces
    for (at, size), (cut, d) in zip(got.alignment.jumps, cuts):
        assert abs(size - d) <= 1 + (ppm > 0), got.alignment.jumps  # after resampling, on the reference's clock
        assert cut - 16 <= at <= cut + max(-d, 0) + 16, got.alignment.jumps  # within 1 ms (a drop: anywhere in the lost stretch)
    assert got.clock_ppm == pytest.approx(ppm, abs=max(5, 0.01 * ppm))
    assert sum("jumps 3 times" in n for n in got.notes) == 1, got.notes
    said = next(n for n in got.notes if "jumps 3 times" in n)  # each jump's size and place in the reference, in words
    assert re.search(r"\+(19\.9|20\.0|20\.1) ms at 1\.50 s, -(9\.9|10\.0|10\.1) ms at 7\.2\d s, \+(49\.9|50\.0|50\.1) ms at 13\.30 s", said), said
    assert "| 3 |" in pairs.to_markdown([got], []) and ",3," in pairs.to_csv([got], [])
    assert got.scores.lsd_high == pytest.approx(same.scores.lsd_high, abs=0.1)
    assert got.scores.visqol == pytest.approx(same.scores.visqol, abs=0.05)
    assert got.scores.pesq_wb == pytest.approx(same.scores.pesq_wb, abs=0.05)
    # the figure draws what was undone, and only that
    from nenv.report.figures import alignment_grid

    assert got.undone and not same.undone
    assert len(got.found.segments) >= 12 and max(abs(v) for _, v in got.found.segments) > 20  # lags as first found: the jumps show
    assert alignment_grid([same], tmp_path / "none.png") == 0 and not (tmp_path / "none.png").exists()
    assert alignment_grid([same, got], tmp_path / "a.png") == 1
    assert (tmp_path / "a.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_jumps_that_add_up_beyond_the_search_are_followed(extended):
    """80 s whose offset grows by 77 ms every 20 s (231 ms in all, beyond the +-150 ms each segment is
    searched within around the offset found): each segment is searched around its neighbours' lags
    too, so every jump is found and the lined-up bands match. Searched around the offset alone, the
    first jump came out 7.5 ms wrong here, and a 3-minute call with eight such jumps was refused ("no
    common speech", median correlation 0.27)."""
    ref, _, y = extended
    gap = np.zeros(16000)
    tile_r, tile_o = np.concatenate([ref, gap] * 4), np.concatenate([y, gap] * 4)
    r = np.concatenate([tile_r] * 4)
    o = np.concatenate([np.concatenate([np.zeros(1234), tile_o])] * 4)
    a = lineup.align(r, o)
    assert [d for _, d in a.jumps] == [1234] * 3 and a.correlation > 0.95
    for (at, _), k in zip(a.jumps, (1, 2, 3)):
        assert k * tile_r.size - 16000 <= at <= k * tile_r.size  # in the pause before the next tile
    u = lineup.line_up(r, o, level_dbov=-26)
    assert np.corrcoef(telband.band(u.ref), telband.band(u.out))[0, 1] > 0.999
    # the gain is that of the lined-up pair: at one offset the other pieces' blocks do not match, and
    # the gain found there was low (-1.2 dB over the 3-minute call, the high band then 1.2 dB too loud)
    assert u.alignment.gain_db == pytest.approx(0.0, abs=0.05) and a.gain_db < -0.2


def test_lost_packets_in_speech_are_counted(extended):
    """Twelve 20 ms packets of the loudest speech lost (zeros) in 20 s: a note counts them, and only
    them; the same output without losses gets no note (nor does any held-out clip's extension through a
    20 dB SNR channel: measured 0 of 10-126 blocks each)."""
    ref, _, y = extended
    gap = np.zeros(16000)
    r, o = np.concatenate([ref, gap] * 4), np.concatenate([y, gap] * 4)
    blk = telband.MATCH_BLOCK
    e = np.sum(telband.band(r)[: r.size // blk * blk].reshape(-1, blk) ** 2, axis=1)
    lost = np.argsort(e)[::-1][:40:3][:12]  # among the loudest blocks, not all side by side
    holed = o.copy()
    for k in lost:
        holed[k * blk : (k + 1) * blk] = 0.0
    assert telband.unmatched(r, o)[0] == 0 and telband.unmatched(r, holed)[0] == 12
    notes = lineup.line_up(r, holed, level_dbov=-26).notes
    assert sum(n.startswith("12 of the ") and "do not follow the reference" in n for n in notes) == 1, notes
    checked, share = (int(v) for v in re.search(r"^12 of the (\d+) loudest 20 ms blocks \((\d+)%\)", next(n for n in notes if n.startswith("12 of"))).groups())
    assert share == round(100 * 12 / checked) and checked > 12
    need = -(-2 * checked // 100)  # the note's threshold: 2% of the checked blocks (our rule), rounded up
    assert need <= 12
    for k, noted in ((need - 1, False), (need, True)):
        fewer = o.copy()
        for b in lost[:k]:
            fewer[b * blk : (b + 1) * blk] = 0.0
        assert any("do not follow" in n for n in lineup.line_up(r, fewer, level_dbov=-26).notes) == noted, (k, checked)
    assert not any("do not follow" in n for n in lineup.line_up(r, o, level_dbov=-26).notes)


def test_unmatched_blocks_worked_on_tones():
    """telband.unmatched on 20 ms blocks (320 samples) of a 1 kHz tone, each an exact number of
    periods: blocks at -19 dB re the loudest are checked and at -20.5 dB (or silent) are not (20 dB, our
    rule), nor is any block of a silent reference; a checked block whose output adds a 1.5 kHz tone
    (orthogonal over the block) so that the bands correlate 1/sqrt(1 + k^2) = 0.45 does not match,
    0.55 does (0.5, our rule)."""
    blk, sr = 320, 16000
    t = np.arange(blk) / sr
    tone, other = np.sin(2 * np.pi * 1000 * t), np.sin(2 * np.pi * 1500 * t)
    levels = [1.0] * 10 + [0.0] * 5 + [10 ** (-19 / 20)] * 10 + [0.0] * 5 + [10 ** (-20.5 / 20)] * 10 + [0.0] * 5
    r = np.concatenate([a * tone for a in levels])
    assert telband.unmatched(r, r) == (0, 20)
    assert telband.unmatched(np.tile(tone, 50), np.tile(tone, 50)) == (0, 50)  # 16000 samples: 50 blocks
    assert telband.unmatched(0 * r, r) == (0, 0) and telband.unmatched(1e-3 * r, 1e-3 * r) == (0, 20)  # any level
    assert telband.unmatched(tone, -tone) == (1, 1) and telband.unmatched(tone[:319], -tone[:319]) == (0, 0)  # one block; none
    for rho, bad in ((0.45, 1), (0.55, 0)):
        for i in (3, 20):  # a loud block, and one at -19 dB
            o = r.copy()
            o[i * blk : (i + 1) * blk] += np.sqrt(1 / rho**2 - 1) * levels[i] * other
            assert telband.unmatched(r, o) == (bad, 20), (rho, i)
        o = r.copy()
        o[32 * blk : 33 * blk] += np.sqrt(1 / rho**2 - 1) * levels[32] * other  # at -20.5 dB: not checked
        assert telband.unmatched(r, o) == (0, 20)


@pytest.mark.parametrize("held", ["tone", "pulses"])
def test_a_held_tone_is_not_taken_for_a_jump(extended, monkeypatch, held):
    """3 s of a two-tone ringback signal (440 + 480 Hz, North American ringback; listed in ITU-T E.180
    Suppl. 2, from memory) or of a steady
    125 Hz pulse train in the middle of the call: every whole period fits it as well as the true lag,
    so its segments' lags do not count, and no jump is found. Counted, they made two false jumps."""
    from scipy.signal import lfilter

    ref, _, y = extended
    gap = np.zeros(16000)
    r, o = np.concatenate([ref, gap] * 4), np.concatenate([y, gap] * 4)
    t = np.arange(48000) / 16000
    if held == "tone":
        ins = 0.1 * (np.sin(2 * np.pi * 440 * t) + np.sin(2 * np.pi * 480 * t))
    else:
        ins = np.zeros(t.size)
        ins[::128] = 1.0
        ins = 0.05 * lfilter([1.0], [1.0, -1.3, 0.8], ins)
    rr = np.concatenate([r[:80000], ins, r[80000:]])
    oo = np.concatenate([np.zeros(500), o[:80000], ins, o[80000:]])
    a = lineup.align(rr, oo)
    assert a.offset == 500 and a.pieces == () and abs(a.drift_ms) < 0.2
    monkeypatch.setattr(lineup, "LAG_MARGIN", -1.0)
    assert lineup.align(rr, oo).pieces != ()


@pytest.mark.parametrize("shape", ["ramp", "step"])
def test_a_level_that_moves_over_the_call_is_evened_out(extended, tmp_path, monkeypatch, shape):
    """20 s of the sentence and pauses whose level an automatic level control moves (a ramp from -6 to
    +4 dB, or a step of 8 dB at 10 s): a note says so, and the output scores as the same output at one
    level. With one gain for the whole call (as before), the step put the high band's level 1.8 dB
    off and ViSQOL 0.16 higher."""
    ref, _, y = extended
    gap = np.zeros(16000)
    r, o = np.concatenate([ref, gap] * 4), np.concatenate([y, gap] * 4)
    t = np.arange(o.size) / 16000
    g = np.interp(t, [0, 20], [-6, 4]) if shape == "ramp" else np.where(t < 10, 0.0, 8.0)
    sf.write(tmp_path / "ref.wav", r, 16000)
    sf.write(tmp_path / "same.wav", o, 16000)
    sf.write(tmp_path / "moved.wav", 0.5 * o * 10 ** (g / 20), 16000)
    same = pairs.score(pairs.Pair("ref", "same", tmp_path / "same.wav", tmp_path / "ref.wav"))
    got = pairs.score(pairs.Pair("ref", "moved", tmp_path / "moved.wav", tmp_path / "ref.wav"))
    assert sum("evened out" in n for n in got.notes) == 1 and not any("evened out" in n for n in same.notes), got.notes
    assert got.scores.lsd_high == pytest.approx(same.scores.lsd_high, abs=0.1)
    assert got.scores.level_error_high == pytest.approx(same.scores.level_error_high, abs=0.3)
    assert got.scores.visqol == pytest.approx(same.scores.visqol, abs=0.05)
    assert got.scores.pesq_wb == pytest.approx(same.scores.pesq_wb, abs=0.05)
    assert got.evened and np.ptp([v for _, v in got.levels]) > telband.LEVEL_TRACK_DB and not same.evened
    lined = lineup.line_up(r, 0.5 * o * 10 ** (g / 20), level_dbov=-26)  # evened out: every second's telephone band
    assert np.max(np.abs(telband.segment_levels(lined.ref, lined.out)[1])) < 0.15  # at the reference's level (measured: 0.1 dB at most)
    if shape == "step":  # the same pair with one gain for the whole call
        monkeypatch.setattr(telband, "LEVEL_TRACK_DB", np.inf)
        one = pairs.score(pairs.Pair("ref", "moved", tmp_path / "moved.wav", tmp_path / "ref.wav"))
        assert abs(one.scores.level_error_high - same.scores.level_error_high) > 1.0


PARALLEL_SCRIPT = """
import sys
from pathlib import Path
from nenv.report import lineup, pairs, telband
root = Path(sys.argv[1])
work, _ = pairs.plan([root / "nb", root / "sys"], root / "ref")
first = pairs.score(work[0])  # this process starts its PESQ worker and ViSQOL before the pool forks
assert first.error is None, first
in_turn = pairs.run(work, workers=1)
apart = pairs.run(work, workers=2)
assert [r.pair for r in apart] == [r.pair for r in in_turn] == list(work)
assert [r.scores for r in apart] == [r.scores for r in in_turn], (apart, in_turn)
assert apart[0].scores == first.scores
print("same", len(work))
"""


def test_pairs_scored_in_worker_processes_match_those_scored_in_turn(folders):
    """``--jobs``: the same scores in the same order, also when this process scored before the workers
    were forked (each makes its own PESQ worker and ViSQOL). Run in a child interpreter with a time
    limit: the failure this guards against was a worker process that never ended."""
    import sys
    from pathlib import Path

    from tests.conftest import run_bounded

    res = run_bounded([sys.executable, "-c", PARALLEL_SCRIPT, str(folders)], cwd=Path(__file__).resolve().parents[1])
    assert res.returncode == 0 and "same 2" in res.stdout, res.stderr[-3000:]


def test_a_channel_choice_applies_to_multichannel_files_only(tmp_path):
    """--channel picks a channel of a stereo recording; a mono file beside it is read as it is (asking
    a mono file for its second channel would otherwise refuse it)."""
    rng = np.random.default_rng(5)
    left, right = (0.1 * rng.standard_normal((2, 1600))).astype(np.float32).astype(np.float64)  # exact in the file's 32-bit floats
    sf.write(tmp_path / "stereo.wav", np.stack([left, right], axis=1), 16000, subtype="FLOAT")
    sf.write(tmp_path / "mono.wav", left, 16000, subtype="FLOAT")
    np.testing.assert_array_equal(pairs._load(tmp_path / "stereo.wav", 1, False).y, right)
    np.testing.assert_array_equal(pairs._load(tmp_path / "mono.wav", 1, False).y, left)
    np.testing.assert_allclose(pairs._load(tmp_path / "stereo.wav", None, True).y, (left + right) / 2, atol=1e-7)


def test_segment_levels_recover_a_known_level_profile_through_channel_noise(rng):
    """The output's level re the reference's, second by second, where the truth is made here: 12 s of
    the ARCTIC bdl sentence (three times), the output the same speech scaled by a profile held over whole
    seconds plus white noise 10 dB below the speech's mean power. Each side's noise floor is taken out,
    so the profile comes back within 0.3 dB (measured: 0.14 at most), at the segments' centres; adding the
    floor instead reads 0.2-7 dB high (most in the quiet -6 dB stretch). A spread over 3 dB is a track;
    a flat profile is none, nor are fewer than three segments."""
    speech, sr = sf.read(ARCTIC[0])
    r = np.tile(speech, 3)[: 12 * sr]
    profile = np.repeat([0.0, 0.0, 0.0, -6.0, -6.0, -6.0, 4.0, 4.0, 4.0, 0.0, 0.0, 0.0], sr)
    noise = rng.standard_normal(r.size) * np.sqrt(np.mean(r**2) / 10)
    o = r * 10 ** (profile / 20) + noise
    at, g = telband.segment_levels(r, o)
    np.testing.assert_array_equal(at, (np.arange(12) + 0.5) * sr)
    np.testing.assert_allclose(g, profile[:: sr], atol=0.3)
    track = telband.level_track(r, o, levels=(at, g))
    assert track is not None and track.size == r.size
    np.testing.assert_allclose(track[at.astype(int)], g)  # through each segment's level, straight lines between
    assert telband.level_track(r, 0.5 * r + noise) is None  # one gain serves
    step = np.repeat([0.0, -8.0, -8.0], sr)
    assert telband.level_track(r[: 3 * sr], r[: 3 * sr] * 10 ** (step / 20)) is not None  # three segments: enough
    assert telband.level_track(r[: 2 * sr], r[: 2 * sr] * 10 ** (step[: 2 * sr] / 20)) is None  # two: too few


def test_a_jump_is_a_step_of_at_least_2_ms_once_the_drift_is_taken_out():
    """Worked by hand: one-second segments 0-5 whose lags drift by 1 sample per segment, with a step of
    40 samples (2.5 ms at 16 kHz) between segments 2 and 3 and one of 30 (1.875 ms) between 4 and 5:
    the drift (the median step per segment) is taken out, the first step is a jump, the second is not."""
    which = np.arange(6)
    lags = np.array([0, 1, 2, 3 + 40, 4 + 40, 5 + 40 + 30])
    np.testing.assert_array_equal(lineup._steps(which, lags), [0, 0, 40, 0, 0])
    # a segment left out (no lag found for it) counts its gap: two segments apart, two samples of drift
    np.testing.assert_array_equal(lineup._steps(np.array([0, 2, 3, 4, 5]), np.array([0, 2, 3, 4 - 32, 5 - 32])), [0, 0, -32, 0])
    assert lineup._steps(np.array([4]), np.array([7])).size == 0


def test_a_lag_is_clear_only_when_no_lag_further_than_1_5_ms_matches_as_well():
    """A one-sample segment against two equal pulses: the correlation is 1 at both. Pulses 25 samples
    apart (more than LAG_UNIQUE = 24, 1.5 ms) leave the lag ambiguous (margin 0); 24 apart they count as
    one peak (margin 1, nothing else correlates)."""
    seg = np.r_[1.0, np.zeros(9)]
    for apart, margin in ((25, 0.0), (24, 1.0)):
        o = np.zeros(300)
        o[100], o[100 + apart] = 1.0, 1.0
        lag, corr, got = lineup._lag_near(seg, o, 100, 0, 50)
        assert (lag, corr, got) == (0, 1.0, margin), apart


def test_the_coarse_offset_is_not_pulled_by_a_loud_unrelated_stretch(rng):
    """Envelope blocks (zero mean, as lineup._envelope gives them): the output holds the reference's
    last 600 blocks, then 400 blocks ten times louder of something else. Each lag's correlation is
    normalised by the blocks the two share, so the lag of the shared 600 (60% of the shorter, above
    MIN_SHARED = 50%) wins with correlation 1, however loud the rest."""
    er = rng.standard_normal(1000)
    eo = np.concatenate([er[400:], 10 * rng.standard_normal(400)])
    lag, corr = lineup._envelope_lag(er, eo, 1000)
    assert lag == -400 and corr == pytest.approx(1.0, abs=0.05)
    eo = np.concatenate([er[600:], 10 * rng.standard_normal(600)])  # only 40% shared: not considered
    assert lineup._envelope_lag(er, eo, 1000)[0] != -600


def test_a_jump_is_placed_where_the_two_lags_fit_best_and_not_within_5_ms_of_an_end():
    """A stretch whose output is 10 samples late up to a split and 40 late after it: the split is found
    to the sample. Within JUMP_BLOCK (80 samples, 5 ms) of either end of the stretch searched it is no
    jump; a stretch of exactly twice that is searched (the split at its middle is found). The signals
    are worked so that the answer is exact: the reference is all ones and the output +1 where either
    lag meets it and -1 elsewhere, so each lag's products are +1 except for the 30 samples next to the
    split on the wrong side, and the fit is largest at the split alone."""
    def stretch(n, split, before=10, after=40):
        r, o = np.ones(n), -np.ones(n + 60)
        o[np.arange(split) + before] = 1.0
        o[np.arange(split, n) + after] = 1.0
        return r, o

    r, o = stretch(1000, 437)
    assert lineup._place(r, o, 0, 1000, 10, 40) == 437
    assert lineup._place(r, o, 200, 900, 10, 40) == 437  # the same split, searched in part of the stretch
    r, o = stretch(160, 80)
    assert lineup._place(r, o, 0, 160, 10, 40) == 80
    assert lineup._place(r, o, 0, 159, 10, 40) is None  # shorter than two blocks: not searched
    r, o = stretch(400, 79)
    assert lineup._place(r, o, 0, 400, 10, 40) is None
    r, o = stretch(400, 400 - 79)
    assert lineup._place(r, o, 0, 400, 10, 40) is None
    for split in (80, 400 - 80):  # at least a block from either end: a jump
        r, o = stretch(400, split)
        assert lineup._place(r, o, 0, 400, 10, 40) == split


def test_the_alignment_does_not_depend_on_the_level_of_the_pair(extended):
    """Which segments hold speech, the offset, the gain and the correlation are all relative: the pair
    60 dB quieter lines up exactly as it is."""
    ref, _, y = extended
    late = np.concatenate([np.zeros(321), 0.5 * y])
    a = lineup.align(ref, late)
    b = lineup.align(1e-3 * ref, 1e-3 * late)
    assert a.offset == b.offset == 321 and a.segments == b.segments and len(a.segments) >= 2
    assert all(t % 1 == 0.5 for t, _ in a.segments)  # each segment at its middle, in seconds of the reference
    assert b.gain_db == pytest.approx(a.gain_db, abs=1e-9) and b.correlation == pytest.approx(a.correlation, abs=1e-9)


def test_segments_within_30_db_of_the_loudest_hold_speech(rng):
    """Which one-second segments of the reference's band get a lag: those within LEVEL_ACTIVE_DB
    (30 dB) of the loudest. Noise segments at exactly 0, -29, -30.5 and -31.5 dB (and the output the
    same): the first two."""
    n = telband.SEGMENT
    parts = []
    for level_db in (0.0, -29.0, -30.5, -31.5):
        x = rng.standard_normal(n)
        parts.append(x / np.sqrt(np.sum(x * x)) * 10 ** (level_db / 20))
    r = np.concatenate(parts)
    which, lags, corrs, _ = lineup._segment_lags(r, r.copy(), 100)
    np.testing.assert_array_equal(which, [0, 1])
    np.testing.assert_array_equal(lags, [0, 0])
    np.testing.assert_allclose(corrs, 1.0)


def test_a_level_track_joins_segment_levels_and_serves_only_when_they_spread_over_3_db():
    """level_track from given segment levels: straight lines between segment centres, flat beyond the
    first and last; None for fewer than three segments or a spread of at most LEVEL_TRACK_DB (3 dB)."""
    o = np.zeros(4 * 16000)
    at = np.array([0.5, 1.5, 2.5]) * 16000
    track = telband.level_track(o, o, levels=(at, np.array([0.0, 4.0, 2.0])))
    assert track.shape == o.shape
    assert track[0] == track[8000] == 0.0 and track[24000] == 4.0 and track[-1] == track[40000] == 2.0
    assert track[16000] == pytest.approx(2.0) and track[32000] == pytest.approx(3.0)
    assert telband.level_track(o, o, levels=(at, np.array([0.0, 3.0, 1.0]))) is None  # spread exactly 3 dB
    assert telband.level_track(o, o, levels=(at, np.array([0.0, 3.01, 1.0]))) is not None
    assert telband.level_track(o, o, levels=(at[:2], np.array([0.0, 9.0]))) is None


def test_segments_within_15_db_of_the_loudest_set_the_level_and_a_second_is_the_least(rng):
    """Noise seconds at 0, -14.6, -15.4, 0 and 0 dB and two silent seconds (the floor): the seconds
    within LEVEL_TRACK_SPEECH_DB (15 dB) of the loudest get a level, the -15.4 dB one and the silent ones
    none, nor does any second of a silent reference. A pair shorter than one second has no segment (and
    no track); exactly one second has one."""
    db = [0.0, -14.6, -15.4, 0.0, 0.0, None, None]
    r = np.concatenate([rng.standard_normal(16000) * 10 ** (d / 20) if d is not None else np.zeros(16000) for d in db])
    at, g = telband.segment_levels(r, 0.5 * r)
    np.testing.assert_array_equal(at, (np.array([0, 1, 3, 4]) + 0.5) * 16000)
    np.testing.assert_allclose(g, 20 * np.log10(0.5), atol=0.01)
    one = rng.standard_normal(16000)
    for n, want in ((15999, []), (16000, [8000.0])):
        at, g = telband.segment_levels(one[:n], one[:n])
        np.testing.assert_array_equal(at, want)
        assert g.size == len(want)
    assert telband.level_track(one[:15999], one[:15999]) is None
    at, g = telband.segment_levels(np.zeros(3 * 16000), one[:12000].repeat(4))  # a silent reference: nothing to compare
    assert at.size == g.size == 0


def test_a_pair_that_differs_by_a_gain_reads_that_gain_in_every_second_whatever_the_floor(rng):
    """The reference with its own noise floor (white noise 10 dB under the speech's mean power) and the
    output that reference at -6 dB: both floors are taken out alike, so every second reads
    20 log10(0.5) dB. Adding the reference's floor instead of taking it out reads 0.7-2.5 dB low."""
    speech, sr = sf.read(ARCTIC[0])
    s = np.tile(speech, 3)[: 8 * sr]
    r = s + rng.standard_normal(s.size) * np.sqrt(np.mean(s**2) / 10)
    at, g = telband.segment_levels(r, 0.5 * r)
    assert at.size >= 6
    np.testing.assert_allclose(g, 20 * np.log10(0.5), atol=1e-9)


def test_segment_levels_take_a_median_of_three_so_one_odd_second_moves_nothing(rng):
    """Six seconds of band noise and one of silence; the output is the reference with a gain per second.
    One second 10 dB off is outvoted by its neighbours; two in a row are kept; the silent second holds
    no speech and gets no level."""
    r = np.concatenate([rng.standard_normal(6 * 16000), np.zeros(16000)])
    for gains, want in (([0, 0, 0, 10, 0, 0], [0, 0, 0, 0, 0, 0]), ([0, 0, 10, 10, 0, 0], [0, 0, 10, 10, 0, 0])):
        g = np.repeat(np.r_[gains, 0.0], 16000)
        at, levels = telband.segment_levels(r, r * 10 ** (g / 20))
        np.testing.assert_array_equal(at, (np.arange(6) + 0.5) * 16000)
        np.testing.assert_allclose(levels, want, atol=0.2)
