"""The low band (50-300 Hz): its filter, where it is added and where not, its guard check, its measures."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import signal

from nenv.chain import features, pipeline
from nenv.chain.guard import Check, Guard, GuardLimits, Tally
from nenv.dsp import channel, lpc
from nenv.dsp.synthesis import UPSAMPLER_DELAY, low_band_sos
from nenv.media import audio
from nenv.report import measures
from nenv.settings import HOP_NB, HOP_WB, WIN_NB

LOW_SYSTEMS = ["neural", "codebook", "oracle", "true-band"]  # the systems that can add a low band


def _nb(ref):
    return channel.telephone(ref, sr=16000, level_dbov=None)


def _band_db(x, y, lo, hi):
    """Energy of x relative to y in lo..hi Hz, over the whole signal, in dB."""
    f, px = signal.welch(x, fs=16000, nperseg=4096)
    _, py = signal.welch(y, fs=16000, nperseg=4096)
    sel = (f >= lo) & (f <= hi)
    return 10 * np.log10(px[sel].sum() / py[sel].sum())


def test_low_band_filter_response_is_as_documented():
    # Reference: scipy.signal.sosfreqz evaluates the sections' response independently of the chain.
    w, h = signal.sosfreqz(low_band_sos(), worN=65536, fs=16000)
    db = 20 * np.log10(np.abs(h) + 1e-15)
    assert db[w >= 300].max() <= -60.0  # the telephone band is left alone
    assert np.abs(db[(w >= 65) & (w <= 250)]).max() < 0.75  # the low band passes
    assert db[w <= 40].max() < -29.0 and db[w <= 30].max() < -40.0  # no rumble
    z, p, _ = signal.sos2zpk(low_band_sos())
    assert np.abs(p).max() < 1.0  # stable


@pytest.mark.parametrize("name", LOW_SYSTEMS)
def test_telephone_band_untouched_with_the_low_band(name, arctic_refs):
    # Reference: the input upsampled by soxr (an independent resampler), as for the high band alone.
    for _, ref in arctic_refs:
        x = _nb(ref)
        y = pipeline.extend(x, system=pipeline.make_system(name, reference=ref, low_band=True)).y
        up = audio.resample(x, orig_sr=8000, target_sr=16000)
        assert _band_db(y - up, up, 300, 3300) < -40
        # and the low band is really there: the output holds more below 300 Hz than the input does
        assert _band_db(y, up, 70, 250) > 3


@pytest.mark.parametrize("name", LOW_SYSTEMS)
def test_low_band_is_chunk_invariant_and_equals_the_engines(name, arctic_refs, rng):
    _, ref = arctic_refs[0]
    x = _nb(ref)[: HOP_NB * 200]
    whole = pipeline.Chain(pipeline.make_system(name, reference=ref, low_band=True)).process(x)
    chain = pipeline.Chain(pipeline.make_system(name, reference=ref, low_band=True))
    cuts = np.unique(np.concatenate([[0, 200], rng.integers(1, 200, 15)])) * HOP_NB
    parts = np.concatenate([chain.process(x[s:e]) for s, e in zip(cuts[:-1], cuts[1:])])
    np.testing.assert_allclose(parts, whole, atol=1e-12)


def test_many_calls_with_the_low_band_equal_one_call_each(arctic_refs):
    from nenv.serve.multicall import MultiCallEngine
    from nenv.serve.runtime import CallEngine

    xs = [_nb(ref)[: HOP_NB * 150] for _, ref in arctic_refs]
    multi = MultiCallEngine(low_band=True)
    got = {str(i): [] for i in range(len(xs))}
    for i in range(len(xs)):
        multi.open(str(i))
    # the second call's packets come two at a time every other step, so some steps carry the first
    # call alone (the chain then works on a selection of its rows, which it reads and writes back)
    fed = 0
    for k, s in enumerate(range(0, HOP_NB * 150, 250)):
        multi.feed("0", xs[0][s : s + 250])
        if k % 2:
            multi.feed("1", xs[1][fed : s + 250])
            fed = min(s + 250, xs[1].size)
        for cid, y in multi.step().items():
            got[cid].append(y)
    multi.feed("1", xs[1][fed:])
    for i, x in enumerate(xs):
        mine = np.concatenate(got[str(i)] + [multi.close(str(i))])
        one = CallEngine(low_band=True)
        alone = np.concatenate([one.feed(x), one.flush()])
        assert mine.shape == alone.shape == (2 * x.size,)
        np.testing.assert_allclose(mine, alone, atol=1e-9)
        off = CallEngine()
        assert np.abs(alone - np.concatenate([off.feed(x), off.flush()])).max() > 1e-3  # the low band is there


def test_no_low_band_in_silence_noise_or_below_50_hz(arctic_refs, rng):
    def added(x, ref=None):
        on = pipeline.extend(x, system=pipeline.make_system("neural", low_band=True)).y
        off = pipeline.extend(x, system=pipeline.make_system("neural")).y
        return on - off, off

    # digital silence: nothing at all
    d, _ = added(np.zeros(8000))
    assert np.all(d == 0)
    # unvoiced-like input (telephone-band noise has no pitch): next to nothing added (measured 59 dB
    # below the output; a rare noise hop's voicing passes the gate's 0.4)
    noise = _nb(rng.standard_normal(32000) * 0.05)
    d, off = added(noise)
    assert np.sqrt(np.mean(d**2)) < 1e-2 * np.sqrt(np.mean(off**2))
    # real speech: a low band is added, and nothing below 50 Hz to speak of (the filter's -11 dB at 50 Hz
    # and 40 dB below 32 Hz, on top of the excitation's own DC removal)
    _, ref = arctic_refs[0]
    d, off = added(_nb(ref))
    assert _band_db(d, off, 70, 250) > -10
    f, p = signal.welch(d, fs=16000, nperseg=4096)  # 3.9 Hz bins
    assert 10 * np.log10(p[f <= 40].sum() / p[(f >= 70) & (f <= 250)].sum()) < -30


def test_low_band_is_gated_by_voicing_hop_by_hop(arctic_refs):
    # The added low band follows the narrowband voicing: in hops the voicing rule has given weight 0 for
    # 40 ms the added band has died away (the filter's poles near 250 Hz ring on; measured -33 dB re the
    # fully weighted hops on this clip), in fully weighted hops it is there.
    _, ref = arctic_refs[0]
    x = _nb(ref)
    d = pipeline.extend(x, system=pipeline.make_system("neural", low_band=True)).y - pipeline.extend(x, system=pipeline.make_system("neural")).y
    frames = lpc.frame(np.concatenate([x, np.zeros(HOP_NB)]), frame_length=240, hop_length=HOP_NB)[: x.size // HOP_NB]
    v = features.voicing(frames)
    w = np.clip((v - 0.4) / 0.3, 0, 1)
    n = min(w.size, d.size // HOP_WB)
    p = np.mean(d[: n * HOP_WB].reshape(n, HOP_WB) ** 2, axis=1)
    quiet = np.array([i for i in range(3, n) if w[i - 3 : i + 1].max() == 0])  # unweighted for 40 ms
    loud = np.flatnonzero(w[:n] == 1)
    assert quiet.size >= 5 and loud.size > 10
    assert np.median(p[quiet]) < 10 ** (-2.5) * np.median(p[loud])


def test_low_band_weight_rule_by_hand():
    # 0 below voicing 0.4, linear to the +LOW_BAND_GAIN_DB trim at 0.7; 0 where the envelope's gain is
    # 0 (digital silence) or not finite, whatever the voicing.
    from nenv.chain.systems import low_band_weights
    from nenv.settings import LOW_BAND_GAIN_DB

    trim = 10 ** (LOW_BAND_GAIN_DB / 20)
    w = low_band_weights(np.array([0.2, 0.4, 0.55, 0.7, 0.95, 0.9, 0.9, 0.9]), np.array([1.0, 1, 1, 1, 1, 0.0, np.nan, np.inf]))
    np.testing.assert_allclose(w, [0, 0, 0.5 * trim, trim, trim, 0, 0, 0], atol=1e-12)


def test_hop_ramp_kernel_equals_numpy_broadcasting(rng):
    # Reference: the weights built with numpy broadcasting, hop by hop from the previous hop's weight.
    from nenv.dsp import kernels

    x = rng.standard_normal((3, 7 * HOP_WB))
    w = rng.random((3, 7))
    prev = rng.random(3)
    start = np.concatenate([prev[:, None], w[:, :-1]], axis=1)
    want = x * (start[:, :, None] + (w - start)[:, :, None] * (np.arange(1, HOP_WB + 1) / HOP_WB)).reshape(3, -1)
    last = prev.copy()
    np.testing.assert_allclose(kernels.hop_ramp(x, w, last, HOP_WB), want, rtol=1e-15, atol=1e-15)
    np.testing.assert_array_equal(last, w[:, -1])


def test_true_band_low_band_is_the_references_own_filtered():
    # The low band's ceiling: the reference itself through the same filter, aligned like the narrowband path.
    rng = np.random.default_rng(3)
    ref = rng.standard_normal(16000) * 0.1
    x = _nb(ref)
    with_low = pipeline.Chain(pipeline.make_system("true-band", reference=ref, low_band=True)).process(x)
    without = pipeline.Chain(pipeline.make_system("true-band", reference=ref)).process(x)
    delayed = np.concatenate([np.zeros(UPSAMPLER_DELAY), ref])[: with_low.size]
    delayed[:HOP_WB] *= np.arange(1, HOP_WB + 1) / HOP_WB  # a call's first hop fades in from silence
    np.testing.assert_allclose(with_low - without, signal.sosfilt(low_band_sos(), delayed), atol=1e-12)


def test_low_band_level_of_an_envelope_matches_freqz():
    # Reference: scipy.signal.freqz of G/A on the 512-point grid, summed over 50-300 Hz (bins 62.5-281 Hz).
    rng = np.random.default_rng(5)
    a = lpc.from_reflection(rng.uniform(-0.8, 0.8, (6, 16)))
    gain = rng.uniform(0.01, 1.0, 6)
    nb_db = rng.uniform(-50, -20, 6)
    got = features.low_band_level(a, gain, nb_db)
    for i in range(6):
        w, h = signal.freqz([gain[i]], a[i], worN=257, fs=16000, include_nyquist=True)
        sel = (w >= 50) & (w <= 300)
        want = 10 * np.log10(2 * np.sum(np.abs(h[sel]) ** 2) / 512) - nb_db[i]
        assert got[i] == pytest.approx(want, abs=1e-9)
    # flat envelope, worked by hand: a unit-power white excitation puts 8 of 256 bins' worth, 250/8000, in the band
    assert features.low_band_level(np.array([[1.0]]), np.array([1.0]), np.zeros(1))[0] == pytest.approx(10 * np.log10(250 / 8000))


def test_the_low_band_level_the_guard_judges_is_the_level_the_chain_adds(arctic_refs):
    # The guard judges each hop's low band by the level its envelope implies at full weight
    # (features.low_band_level plus LOW_BAND_GAIN_DB). Checked against the signal itself: in strongly
    # voiced hops (full weight) the power the low band adds to the output, re the narrowband frame's
    # plain power, has a median within 4 dB of the recorded level (measured -1.9 and -2.0 dB on the
    # two ARCTIC sentences: the rectified excitation is not white, and hops are cut without regard to
    # the filters' delay). A level off by the gain twice (12 dB) would fail.
    for name, ref in arctic_refs:
        x = _nb(ref)
        plain = pipeline.extend(x, system=pipeline.make_system("neural")).y
        system = pipeline.make_system("neural", low_band=True)
        added = pipeline.extend(x, system=system).y - plain
        low_db = system.estimator.record().low_db
        frames = np.ascontiguousarray(lpc.frame(x, frame_length=WIN_NB, hop_length=HOP_NB))  # each hop's 30 ms analysis frame
        H = frames.shape[0]
        p_frame = np.mean(frames**2, axis=1)
        p_added = np.mean(added[: H * HOP_WB].reshape(H, HOP_WB) ** 2, axis=1)
        sel = (features.voicing(frames) > 0.8) & (p_frame > 1e-5)
        assert sel.sum() > 100, name
        diff = 10 * np.log10(p_added[sel] / p_frame[sel]) - low_db[:H][sel]
        assert abs(np.median(diff)) < 4, (name, np.median(diff))


def test_guard_checks_the_low_band_only_when_it_is_on():
    limits = GuardLimits(level_min_db=-100, level_max_db=100, mismatch_max_db=1e9, novelty_max=1e9, low_min_db=-30.0, low_max_db=5.0)
    n = 6
    a = np.tile(np.r_[1.0, np.zeros(16)], (n, 1))
    common = dict(ceps=np.zeros((n, 20)), level_db=np.zeros(n), a=a, gain=np.ones(n), a_nb=np.tile(np.r_[1.0, np.zeros(10)], (n, 1)), novelty=np.zeros(n), cell=np.zeros(n, dtype=int))
    low = np.array([-40.0, -30.0, 0.0, 5.0, 6.0, np.nan])
    on = Guard(limits, low_band=True).check(**common, low_db=low)
    np.testing.assert_array_equal(on.rejected, [True, False, False, False, True, True])
    assert all(on.reasons[i] == Check.LOW_BAND for i in (0, 4, 5))
    np.testing.assert_array_equal(on.low_db[:5], low[:5])
    off = Guard(limits).check(**common)
    assert not off.rejected.any() and np.isnan(off.low_db).all()
    tally = Tally()
    tally.add(0, on)
    assert tally.by_reason == {"low_band": 3}
    # a model trained before the low band has no range: only a non-finite level is rejected
    old = GuardLimits.from_dict({k: v for k, v in limits.to_dict().items() if not k.startswith("low_")})
    np.testing.assert_array_equal(Guard(old, low_band=True).check(**common, low_db=low).rejected, [False] * 5 + [True])
    with pytest.raises(ValueError):
        Guard(limits, low_band=True).check(**common)


def test_shipped_model_has_a_low_band_range():
    ck = pipeline.load_model(None)
    assert ck.limits.low_min_db is not None and ck.limits.low_max_db is not None
    assert -80 < ck.limits.low_min_db < ck.limits.low_max_db < 40


def test_low_band_measures_worked_example():
    # Halving the amplitude below 300 Hz is 20 log10(0.5) = -6.02 dB of level and, for every bin
    # in the band, 6.02 dB of log-spectral distance (a worked example of the definitions).
    rng = np.random.default_rng(7)
    ref = rng.standard_normal(32000) * 0.1
    sos = signal.butter(8, 400, fs=16000, output="sos")
    low = signal.sosfiltfilt(sos, ref)
    est = ref - 0.5 * low
    s = measures.Scores.compute(ref, est)
    assert s.level_error_low == pytest.approx(20 * np.log10(0.5), abs=0.05)
    assert s.lsd_low == pytest.approx(-20 * np.log10(0.5), abs=0.1)
    assert abs(s.level_error_high) < 0.01  # the high band is untouched
    assert measures.low_band_level_error(ref, ref) == 0.0


def test_low_band_rejections_are_recorded_and_audited(tmp_path, arctic_refs):
    """A model whose low-band range nothing fits: every voiced hop falls back for 'low_band', each is
    written to the record with its level, the audit table counts it, and a re-run agrees."""
    import json
    import shutil

    import soundfile as sf
    from typer.testing import CliRunner

    from nenv.chain import checkpoint
    from nenv.cli import app
    from nenv.report import records
    from nenv.report.audit import rerun, table

    model = tmp_path / "model"
    shutil.copytree(checkpoint.default_path(), model)
    info = json.loads((model / "nenv.json").read_text())
    info["guard"]["low_min_db"], info["guard"]["low_max_db"] = -200.0, -150.0
    (model / "nenv.json").write_text(json.dumps(info))
    _, ref = arctic_refs[0]
    sf.write(tmp_path / "call.wav", _nb(ref), 8000)
    rec = tmp_path / "guard.jsonl"
    runner = CliRunner()
    res = runner.invoke(app, ["extend", str(tmp_path / "call.wav"), str(tmp_path / "wb.wav"), "--model", str(model), "--low-band", "--record", str(rec)])
    assert res.exit_code == 0, res.output
    guard_line = next(line for line in res.output.splitlines() if line.startswith("guard:"))
    assert "low_band" in guard_line  # the summary line names the reason
    r = records.read([rec])
    low = [x for x in r.rejects if "low_band" in x["reasons"]]
    assert len(low) > 20 and all(x["values"]["low_db"] > -150.0 for x in low)
    assert table(r)[0].by_reason["low_band"] == len(low)
    again = rerun(r, checkpoint.load(model))
    assert all(sorted(x["new"]) == sorted(x["old"]) for x in again)
    # without --low-band the same model rejects none of them for it
    res = runner.invoke(app, ["extend", str(tmp_path / "call.wav"), str(tmp_path / "wb2.wav"), "--model", str(model), "--record", str(tmp_path / "g2.jsonl")])
    assert res.exit_code == 0 and "low_band" not in next(line for line in res.output.splitlines() if line.startswith("guard:"))


def test_low_band_with_a_method_that_has_none_is_refused(tmp_path, arctic_refs):
    import soundfile as sf
    from typer.testing import CliRunner

    from nenv.cli import app

    _, ref = arctic_refs[0]
    sf.write(tmp_path / "call.wav", _nb(ref)[:8000], 8000)
    res = CliRunner().invoke(app, ["extend", str(tmp_path / "call.wav"), str(tmp_path / "wb.wav"), "--method", "imaging", "--low-band"])
    assert res.exit_code != 0 and "adds no low band" in res.output and not (tmp_path / "wb.wav").exists()
    # the same rule for a program embedding nenv (it used to get no low band without a word)
    from nenv.errors import InputError
    from nenv.serve.multicall import MultiCallEngine
    from nenv.serve.runtime import CallEngine

    for make in (lambda: CallEngine(method="unextended", low_band=True), lambda: MultiCallEngine(method="imaging", low_band=True)):
        with pytest.raises(InputError, match="adds no low band"):
            make()


def test_live_commands_refuse_the_low_band_of_a_method_without_one_before_they_start():
    """The relay makes its systems per stream: unchecked, the refusal would come only with the first
    call's packet, inside the serving loop. Both live commands refuse at once, in one line, status 2."""
    import subprocess
    import sys

    for args in (["stream"], ["relay", "--to", "127.0.0.1:9", "--listen", "127.0.0.1:0"]):
        res = subprocess.run([sys.executable, "-m", "nenv", *args, "--method", "imaging", "--low-band"], input=b"", capture_output=True, timeout=120)
        err = res.stderr.decode().strip().splitlines()
        assert res.returncode == 2 and res.stdout == b"", res.stderr.decode()[-2000:]
        assert err[-1].startswith("nenv: error: low_band (--low-band): the imaging method adds no low band"), err


def test_evaluate_with_the_low_band_says_so_and_scores_it():
    from nenv.report import evaluate as ev
    from tests.conftest import ARCTIC

    rows, _ = ev.run([ARCTIC[0]], systems=("unextended", "true-band"), laws=("mulaw",), low_band=True)
    by = {r.system: r.scores for r in rows}
    assert set(by) == {"unextended", "true-band +low band"}  # unextended has none to add
    # the reference's own low band brings the low band's level and spectrum back (unextended: 5-6 dB short)
    assert by["unextended"].level_error_low < -3 and abs(by["true-band +low band"].level_error_low) < 1
    assert by["true-band +low band"].lsd_low < by["unextended"].lsd_low - 10


def test_evaluate_compares_with_and_without_the_low_band_in_one_table(tmp_path):
    """``--compare-low-band``: each system that can add the band runs without and then with it, and
    each row equals what a run with or without ``--low-band`` gives."""
    import csv

    from typer.testing import CliRunner

    from nenv.cli import app
    from tests.conftest import ARCTIC

    def table(*extra):
        out = tmp_path / "_".join(extra or ("plain",))
        res = CliRunner().invoke(app, ["evaluate", str(ARCTIC[0]), "--out", str(out), "--law", "mulaw", "--method", "unextended", "--method", "true-band", *extra])
        assert res.exit_code == 0, res.output
        return [(r["system"], r["lsd_low"], r["visqol"]) for r in csv.DictReader(open(out / "table.csv")) if r["clip"] == "arctic_a0007"]

    both = table("--compare-low-band")
    assert [s for s, *_ in both] == ["unextended", "true-band", "true-band +low band"]
    assert both == table() + table("--low-band")[1:]
    res = CliRunner().invoke(app, ["evaluate", str(ARCTIC[0]), "--out", str(tmp_path / "x"), "--low-band", "--compare-low-band"])
    assert res.exit_code == 2 and "exclude each other" in res.output


def test_low_band_variants_follow_the_systems_order():
    from nenv.report.evaluate import variants

    systems = ("unextended", "imaging", "neural", "oracle")
    assert variants(systems, False) == [(s, False) for s in systems]
    assert variants(systems, True) == [("unextended", False), ("imaging", False), ("neural", True), ("oracle", True)]
    assert variants(systems, "both") == [("unextended", False), ("imaging", False), ("neural", False), ("neural", True), ("oracle", False), ("oracle", True)]
    with pytest.raises(ValueError):
        variants(systems, "on")
