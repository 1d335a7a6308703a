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
    assert [f.speaker for f in corpus.scan(tmp_path, speaker_rule="depth:1")] == ["s1", "s1", "s2", "s3", "s3"]
    assert [f.speaker for f in corpus.scan(tmp_path, speaker_rule="depth:2")] == ["a/s1", "a/s1", "a/s2", "a/s3", "a/s3"]  # too deep: the parent
    (tmp_path / "flat").mkdir()
    sf.write(tmp_path / "flat" / "solo.wav", np.zeros(1600), 16000)
    for rule in ("parent", "depth:0"):  # a file right in the root is its own speaker
        assert [f.speaker for f in corpus.scan(tmp_path / "flat", speaker_rule=rule)] == ["solo"]
    man = tmp_path / "m.csv"
    man.write_text("path,speaker\na/s1/x.wav,alice\na/s2/z.ogg,bob\n")
    assert [(f.speaker) for f in corpus.scan(tmp_path, manifest=str(man))] == ["alice", "bob"]
    for text in ("file,who\na/s1/x.wav,alice\n", "path,speaker\n"):  # other columns; a header alone
        man.write_text(text)
        with pytest.raises(ConfigError, match="columns path,speaker"):
            corpus.scan(tmp_path, manifest=str(man))
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


def test_split_keeps_a_speaker_on_each_side_at_the_edges():
    """The draw's limits: at least one validation speaker unless the recipe names some, at least one
    training speaker unless it names some, and two speakers are enough."""
    reps = [corpus.FileReport(path=f"{s}/{i}.wav", speaker=s) for s in "abcdefghij" for i in range(3)]

    def speakers(val_fraction, **named):
        tr, va = corpus.split_speakers(reps if named.pop("all", True) else reps[:6], val_fraction=val_fraction, seed=0, **named)
        return {r.speaker for r in tr}, {r.speaker for r in va}

    tr, va = speakers(0.2, all=False)  # two speakers: one each
    assert len(tr) == len(va) == 1 and tr | va == {"a", "b"}
    assert len(speakers(0.0)[1]) == 1  # none asked for: still one to validate on
    assert len(speakers(1.0)[0]) == 1  # all asked for: still one to train on
    assert speakers(1.0, train_speakers=["c"])[0] == {"c"}  # a named training speaker is enough
    assert speakers(0.0, val_speakers=["a"])[1] == {"a"}  # a named validation speaker is enough
    with pytest.raises(ConfigError, match="no speaker for training"):
        speakers(0.2, val_speakers=list("abcdefghij"))


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


def _bursts(rng, spectrum_step=None, seconds=3.0):
    """White-noise bursts of 0.25 s with near-silence between (the survey needs active frames);
    spectrum_step = (Hz, dB): everything above Hz lowered by dB."""
    n = int(16000 * seconds)
    spec = np.fft.rfft(rng.standard_normal(n))
    if spectrum_step is not None:
        spec[np.fft.rfftfreq(n, 1 / 16000) > spectrum_step[0]] *= 10 ** (-spectrum_step[1] / 20)
    x = 0.1 * np.fft.irfft(spec, n)
    return np.where((np.arange(n) // 4000) % 2 == 0, x, 1e-4 * rng.standard_normal(n))


def test_band_limit_rules_at_their_thresholds():
    # A drop of more than CLIFF_DB (25 dB) within 600 Hz is a cliff; a 20 dB step is not. A roll-off
    # just above the searched range counts when 6.4-7.0 kHz lies more than TOP_DROP_DB (12 dB) over
    # 7.3-7.6 kHz (reported as 7200 Hz). Our own rules, measured on shaped noise.
    rng = np.random.default_rng(5)
    assert corpus.measure(_bursts(rng, (6000, 30)))["cutoff_hz"] == 6000
    assert corpus.measure(_bursts(rng, (6000, 20)))["cutoff_hz"] == 8000
    assert corpus.measure(_bursts(rng, (7250, 18)))["cutoff_hz"] == corpus.TOP_ROLLOFF_HZ
    assert corpus.measure(_bursts(rng, (7250, 6)))["cutoff_hz"] == 8000


def test_active_speech_is_10_db_over_the_floor():
    # 1 s of floor noise, 1 s 8 dB above it (not active), 0.5 s 30 dB above it (active): 0.5 s counts.
    rng = np.random.default_rng(6)
    floor = 1e-3
    y = np.concatenate([floor * rng.standard_normal(16000), floor * 10 ** (8 / 20) * rng.standard_normal(16000), floor * 10 ** (30 / 20) * rng.standard_normal(8000)])
    m = corpus.measure(y)
    assert m["active_s"] == pytest.approx(0.5, abs=0.02) and m["snr_db"] == pytest.approx(30, abs=1.5)


def test_clipping_shows_as_flat_runs_or_as_a_pile_up_near_full_scale():
    rng = np.random.default_rng(7)
    y = 0.2 * rng.standard_normal(16000)
    assert corpus._clipped_fraction(y / np.max(np.abs(y)) * 0.9) < 0.001  # a normal peak: nothing
    flat = y.copy()
    flat[1000:1040] = 0.999  # one clipped run of 40 samples
    assert corpus._clipped_fraction(flat) == pytest.approx(40 / 16000)
    # lossy coding turns clipped plateaus into ripples: 1% of the samples scattered in 0.92-1.0
    piled = 0.3 * y
    where = rng.choice(y.size, 160, replace=False)
    piled[where] = rng.uniform(0.92, 1.0, 160) * rng.choice([-1, 1], 160)
    assert corpus._clipped_fraction(piled) == pytest.approx(0.01, abs=0.001)
    assert corpus._clipped_fraction(piled * 0.9) < 0.001  # the same shape peaking below 0.95: not counted


def test_exclusion_thresholds_are_the_recipes():
    r = recipe.load(None)
    ok = dict(active_s=r.min_active_s, clipped_fraction=r.max_clipped_fraction, snr_db=r.min_snr_db, cutoff_hz=r.min_cutoff_hz)
    assert corpus.exclusions(ok, r) == []  # each value at its threshold passes
    for key, bad, word in [("active_s", 0.99, "too little"), ("clipped_fraction", 1.01, "clipped"), ("snr_db", 0.99, "noisy"), ("cutoff_hz", 0.99, "band-limited")]:
        reasons = corpus.exclusions({**ok, key: ok[key] * bad}, r)
        assert len(reasons) == 1 and word in reasons[0], (key, reasons)


def test_training_pairs_are_time_aligned():
    # Inputs and targets of a hop describe the same 30 ms: on noise bursts of varied lengths, the
    # narrowband energy and the wideband target's absolute high-band level (level re narrowband +
    # narrowband energy) rise and fall together, best matched at lag 0 (a shift of even one hop
    # between them would move the best lag off 0).
    import numpy as np

    from nenv.chain.features import ENERGY_COLUMN, FeatureSettings
    from nenv.train import dataset

    rng = np.random.default_rng(8)
    parts = []
    for _ in range(30):
        parts.append(0.1 * rng.standard_normal(160 * int(rng.integers(3, 15))))
        parts.append(1e-4 * rng.standard_normal(160 * int(rng.integers(3, 15))))
    y = np.concatenate(parts)
    r = recipe.load(None, overrides=["copies=1", "warp_max=1.0", "laws=['none']", "noise_probability=0", "level_min_dbov=-26", "level_max_dbov=-26", "active_range_db=1000"])
    p = dataset.pairs_from_signal(y, recipe=r, settings=FeatureSettings(), rng=np.random.default_rng(0))
    e_nb = p.current[:, ENERGY_COLUMN]
    e_hb = p.level + e_nb
    assert e_nb.size == y.size // 160
    a, b = e_nb - e_nb.mean(), e_hb - e_hb.mean()
    n = a.size
    corr = {lag: float(np.dot(a[max(0, lag) : n + min(0, lag)], b[max(0, -lag) : n - max(0, lag)])) for lag in range(-3, 4)}
    assert max(corr, key=corr.get) == 0, corr


def test_augmentation_draws_what_the_recipe_says(monkeypatch):
    # Every copy passes the channel with a law from the recipe's list, an active level in its range and,
    # in about noise_probability of the copies, noise at an SNR in its range (seen by watching the calls).
    from nenv.chain.features import FeatureSettings
    from nenv.dsp import channel
    from nenv.train import dataset

    seen = []
    real_level, real_phone = channel.set_level, channel.telephone
    monkeypatch.setattr(dataset.channel, "set_level", lambda y, *, sr, level_dbov: (seen.append(("level", level_dbov)), real_level(y, sr=sr, level_dbov=level_dbov))[1])
    monkeypatch.setattr(dataset.channel, "telephone", lambda y, **kw: (seen.append(("phone", kw["law"], kw["snr_db"])), real_phone(y, **kw))[1])
    y = 0.1 * np.random.default_rng(9).standard_normal(1600)
    r = recipe.load(None, overrides=["copies=60", "warp_max=1.0", "laws=['mulaw', 'alaw']", "noise_probability=0.25", "level_min_dbov=-30", "level_max_dbov=-20", "snr_min_db=25", "snr_max_db=35"])
    dataset.pairs_from_signal(y, recipe=r, settings=FeatureSettings(), rng=np.random.default_rng(0))
    levels = [s[1] for s in seen if s[0] == "level"]
    phones = [s for s in seen if s[0] == "phone"]
    assert len(levels) == len(phones) == 60
    assert all(-30 <= v <= -20 for v in levels) and max(levels) - min(levels) > 5
    assert {p[1] for p in phones} == {"mulaw", "alaw"}
    snrs = [p[2] for p in phones if p[2] is not None]
    assert 5 <= len(snrs) <= 25 and all(25 <= v <= 35 for v in snrs)  # 15 expected of 60


def _peak_hz(y, sr=16000):
    spec = np.abs(np.fft.rfft(y * np.hanning(y.size)))
    return float(np.fft.rfftfreq(y.size, 1 / sr)[np.argmax(spec)])


@pytest.mark.parametrize("sr, factor", [(16000, 1.1), (48000, 0.9), (48000, 1.15)])
def test_warp_scales_every_frequency_by_its_factor(sr, factor):
    # Vocal-tract-length perturbation (Jaitly & Hinton 2013) as nenv does it: resampled to 16000/factor
    # and read as 16 kHz, a 1 kHz tone and a 3 kHz tone come out at factor times their frequency.
    from nenv.train import dataset

    t = np.arange(2 * sr) / sr
    for f0 in (1000.0, 3000.0):
        out = dataset.warp(0.5 * np.sin(2 * np.pi * f0 * t), sr=sr, factor=factor)
        assert out.size == pytest.approx(2 * 16000 / factor, abs=2)
        assert _peak_hz(out) == pytest.approx(f0 * factor, abs=1.0)


@pytest.mark.parametrize("sr, bottom", [(16000, 1.0), (48000, 1 / 1.2)])
def test_warp_factors_span_the_recipes_range_where_the_source_fills_8_khz(monkeypatch, sr, bottom):
    # Factors are drawn in [1/warp_max, warp_max], raised to 16000/sr at least: a 16 kHz source is only
    # ever stretched upwards (a factor under 1 would leave the top of 0-8 kHz empty), a 48 kHz one both ways.
    from nenv.chain.features import FeatureSettings
    from nenv.train import dataset

    factors = []
    real = dataset.warp
    monkeypatch.setattr(dataset, "warp", lambda y, *, sr, factor: (factors.append(factor), real(y, sr=sr, factor=factor))[1])
    y = 0.1 * np.random.default_rng(10).standard_normal(sr // 10)
    r = recipe.load(None, overrides=["copies=80", "warp_max=1.2", "noise_probability=0"])
    dataset.pairs_from_signal(y, sr=sr, recipe=r, settings=FeatureSettings(context=r.context), rng=np.random.default_rng(1))
    assert len(factors) >= 75  # all but the draws within 0.1% of 1
    assert min(factors) >= bottom - 1e-12 and max(factors) <= 1.2 + 1e-12
    assert min(factors) < bottom + 0.03 and max(factors) > 1.17  # the range is used end to end
    factors.clear()
    dataset.pairs_from_signal(y, sr=sr, recipe=recipe.load(None, overrides=["copies=5", "warp_max=1.0"]), settings=FeatureSettings(context=r.context), rng=np.random.default_rng(1))
    assert factors == []  # warp_max = 1 means no warping


def test_silence_or_a_sliver_gives_no_pairs_with_every_column():
    from nenv.chain.features import FeatureSettings
    from nenv.settings import NB_ORDER
    from nenv.train import dataset

    s = FeatureSettings()
    r = recipe.load(None, overrides=["copies=2"])
    for y in (np.zeros(16000), 0.1 * np.ones(100)):
        p = dataset.pairs_from_signal(y, recipe=r, settings=s, rng=np.random.default_rng(0))
        assert p.x.shape == (0, s.input_dim) and p.current.shape == (0, s.n_inputs) and p.ceps.shape == (0, s.n_wb_ceps)
        assert p.level.shape == p.group.shape == p.low.shape == (0,) and p.a_nb.shape == (0, NB_ORDER + 1) and p.seconds == 0.0


def test_built_pairs_name_their_file_count_the_audio_and_come_back_whole_from_the_cache(tmp_path, monkeypatch):
    import time

    from nenv.chain.features import FeatureSettings
    from nenv.train import dataset

    rng = np.random.default_rng(11)
    paths = []
    for k, seconds in enumerate((1.0, 0.5)):
        y = signal.lfilter([1.0], [1.0, -0.9], rng.standard_normal(int(16000 * seconds))) * 0.05
        paths.append(str(tmp_path / f"f{k}.wav"))
        sf.write(paths[-1], y, 16000, subtype="PCM_16")
    r = recipe.load(None, overrides=["copies=3", "warp_max=1.0", "active_range_db=1000"])
    s = FeatureSettings(context=r.context)
    t0 = time.perf_counter()
    pairs, facts = dataset.build(paths, recipe=r, settings=s, cache_dir=str(tmp_path / "cache"))
    assert 0 < facts["wall_s"] <= time.perf_counter() - t0
    one = [dataset.pairs_from_signal(sf.read(p)[0], recipe=r, settings=s, rng=np.random.default_rng(0)).x.shape[0] for p in paths]
    assert one == [300, 150]  # every hop of every copy (active_range_db=1000 keeps them all)
    np.testing.assert_array_equal(pairs.group, np.repeat([0, 1], one))
    assert pairs.seconds == pytest.approx(3 * 1.5) and facts["seconds_audio"] == pairs.seconds
    assert facts["x_real_time"] == pytest.approx(pairs.seconds / facts["wall_s"], rel=1e-9)
    assert pairs.low is not None and pairs.low.shape == (450,)
    assert len(list((tmp_path / "cache").glob("*.npz"))) == 2

    monkeypatch.setattr(dataset, "load_native", lambda path: pytest.fail("read the audio although it was cached"))
    again, _ = dataset.build(paths, recipe=r, settings=s, cache_dir=str(tmp_path / "cache"))
    for k in ("x", "current", "ceps", "level", "a_nb", "group", "low"):
        np.testing.assert_array_equal(getattr(again, k), getattr(pairs, k), err_msg=k)
    assert again.seconds == pairs.seconds
