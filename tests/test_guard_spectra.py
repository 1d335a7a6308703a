"""The guard's spectral measures against scipy.signal.freqz (a general-purpose reference)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import signal

from nenv.dsp import cepstrum, lpc
from nenv.chain.guard import telephone_band_mismatch


def _random_models(rng, n, order):
    return lpc.from_reflection(rng.uniform(-0.95, 0.95, (n, order)))


def test_power_spectrum_matches_freqz_on_the_whole_grid_and_on_a_band(rng):
    # Reference: scipy.signal.freqz(G, A, worN=n_fft//2+1 points of [0, pi]) evaluates G/A(e^jw) directly.
    a = _random_models(rng, 6, 16)
    g = rng.uniform(0.1, 3.0, 6)
    full = cepstrum.power_spectrum(a, gain=g, n_fft=512)
    band = cepstrum.power_spectrum(a, gain=g, n_fft=512, bins=(109, 256))
    for i in range(6):
        _, h = signal.freqz([g[i]], a[i], worN=np.arange(257) * 2 * np.pi / 512)
        np.testing.assert_allclose(full[i], np.abs(h) ** 2, rtol=1e-9)
        np.testing.assert_allclose(band[i], np.abs(h[109:]) ** 2, rtol=1e-9)


def test_mismatch_is_the_rms_of_mean_removed_log_envelopes_over_the_telephone_band(rng):
    # The definition in nenv.chain.guard, evaluated independently with freqz at the same frequencies;
    # more rows than either polynomial has terms (the chain judges up to a thousand hops at once).
    n = 40
    a_wb, a_nb = _random_models(rng, n, 16), _random_models(rng, n, 10)
    f = np.arange(0, 8000.0 + 1, 31.25)
    f = f[(f >= 300) & (f <= 3400)]
    got = telephone_band_mismatch(a_wb, a_nb)
    assert got.shape == (n,)
    for i in range(n):
        _, h_wb = signal.freqz([1.0], a_wb[i], worN=f, fs=16000)
        _, h_nb = signal.freqz([1.0], a_nb[i], worN=f, fs=8000)
        wb, nb = 20 * np.log10(np.abs(h_wb)), 20 * np.log10(np.abs(h_nb))
        d = (wb - wb.mean()) - (nb - nb.mean())
        np.testing.assert_allclose(got[i], np.sqrt(np.mean(d * d)), rtol=1e-5)  # logarithms in single precision


def test_a_zero_of_the_envelope_on_the_unit_circle_gives_a_large_finite_mismatch():
    # A(z) with zeros at +-1 kHz on the unit circle: the envelope 1/|A|^2 is infinite at one of the
    # 99 bins (about 300 dB above the rest), which must count as a large, finite mismatch (a NaN
    # would compare False against the limit and let the hop through).
    z = np.exp(2j * np.pi * 1000 / 16000)
    a_wb = np.real(np.poly([z, np.conj(z)]))
    got = telephone_band_mismatch(a_wb[None, :], np.array([[1.0, 0.0]]))
    assert np.isfinite(got[0]) and got[0] > 20.0


def test_stability_verdicts_from_the_recursions_coefficients_equal_the_step_down_and_numpy_roots(rng):
    """The guard judges stability on the reflection coefficients of the Levinson-Durbin recursion
    that built the envelope; the same verdicts and values come from the step-down of its predictor
    coefficients, and an envelope is judged unstable exactly where numpy.roots puts a pole at or
    beyond 1 - margin (the margin is on |k|, so only the direction is checked: a pole that close
    to the circle means a |k| that close to 1)."""
    from nenv.chain.guard import Check, Guard, GuardLimits

    n, order = 300, 16
    m = np.arange(1, 21)
    ceps = rng.normal(0.0, 0.3, (n, 20)) / m
    sharp = rng.random(n) < 0.3  # resonances so sharp that some reflection coefficient nears 1
    f = rng.uniform(500, 7500, n)[:, None]
    ceps[sharp] = (2 * rng.uniform(0.995, 0.99999, (n, 1)) ** m * np.cos(2 * np.pi * f / 16000 * m) / m * rng.uniform(5, 60, (n, 1)))[sharp]
    c = np.concatenate([np.zeros((n, 1)), ceps], axis=1)
    a, gain, k_rec = cepstrum.from_cepstrum_stable(c, order=order, with_reflection=True)
    guard = Guard(GuardLimits(level_min_db=-100, level_max_db=100, mismatch_max_db=1e9, novelty_max=1e9, stability_margin=1e-3))
    common = dict(ceps=ceps, level_db=np.zeros(n), a=a, gain=gain, a_nb=np.tile(np.r_[1.0, np.zeros(10)], (n, 1)), novelty=np.zeros(n), cell=np.zeros(n, dtype=int))
    with_k, k_used = guard.assess(**common, k=k_rec)
    stepped, k_step = guard.assess(**common)
    np.testing.assert_array_equal(with_k.reasons, stepped.reasons)
    np.testing.assert_allclose(k_used, k_step, atol=1e-9)
    unstable = (with_k.reasons & Check.UNSTABLE) > 0
    assert 0 < unstable.sum() < n  # both verdicts occur
    pole = np.array([np.max(np.abs(np.roots(row))) for row in a])
    assert np.all(pole[~unstable] < 1.0)  # every accepted envelope is minimum phase
    assert np.all(pole[unstable] > 0.99)  # rejected ones have a pole near the unit circle


def test_verdicts_follow_the_documented_rules_alone_or_in_a_batch(rng):
    """Each hop's verdict equals the rules of the guard's documentation applied by hand, with the
    telephone-band mismatch from scipy.signal.freqz; a hop judged alone equals the same hop judged
    in a batch. Inputs mix plain hops with every edge the checks have: NaN and inf anywhere,
    gains <= 0, |k| at and near 1, levels and novelties on both sides of their limits."""
    from nenv.chain.guard import Check, Decisions, Guard, GuardLimits

    guard = Guard(GuardLimits(level_min_db=-40.0, level_max_db=10.0, mismatch_max_db=6.0, novelty_max=3.0, stability_margin=1e-3))
    a_nb = _random_models(rng, 1, 10)
    bad = [np.nan, np.inf, -np.inf]
    seen = {check: [0, 0] for check in (Check.NONFINITE, Check.UNSTABLE, Check.LEVEL, Check.MISMATCH, Check.NOVEL)}  # [passed, failed]
    for trial in range(400):
        k = rng.uniform(-0.999, 0.999, (1, 16))
        a = lpc.from_reflection(k)
        ceps = rng.normal(0.0, 0.3, (1, 20))
        level = rng.uniform(-60, 30, 1)
        gain = rng.uniform(0.01, 2.0, 1)
        novelty = rng.uniform(0.0, 6.0, 1)
        edge, turn = trial % 12, trial // 12  # turn: which of an edge's bad values (each edge recurs every 12 trials)
        if edge == 1:
            ceps[0, rng.integers(20)] = bad[turn % 3]
        elif edge == 2:
            level[0] = bad[turn % 3]
        elif edge == 3:
            gain[0] = [0.0, -1.0, np.nan, np.inf][turn % 4]
        elif edge == 4:
            a[0, rng.integers(1, 17)] = bad[turn % 3]
        elif edge == 5:
            k[0, rng.integers(16)] = bad[turn % 3]
        elif edge == 6:
            k[0, rng.integers(16)] = rng.choice([1.0, -1.0, 0.9995, -0.9985, 1 - guard.limits.stability_margin])  # the last exactly on the limit: unstable
        elif edge == 7:
            novelty[0] = np.nan
        elif edge == 8:
            level[0] = rng.choice([-40.0, 10.0])  # on the limits: accepted
        elif edge == 9:
            novelty[0] = guard.limits.novelty_max  # on the limit: accepted
        hop_nb = a_nb
        if edge == 10:
            # an envelope that follows the narrowband one in the telephone band: A_nb(z^2) (the same response
            # at 16 kHz as A_nb at 8 kHz) with odd taps added, so the mismatch falls on both sides of its limit
            hop_nb = _random_models(rng, 1, 8)
            a = np.zeros((1, 17))
            a[0, ::2] = hop_nb[0]
            a[0, 1::2] = rng.uniform(-1, 1, 8) * rng.uniform(0.0, 1.0)
        kw = dict(ceps=ceps, level_db=level, a=a, gain=gain, a_nb=hop_nb, novelty=novelty, cell=np.array([trial % 7]))
        one, k_one = guard.assess(**kw, k=k)
        two_kw = {name: np.concatenate([v, v]) for name, v in kw.items() if name != "a_nb"}
        two, k_two = guard.assess(**two_kw, a_nb=np.concatenate([hop_nb, hop_nb]), k=np.concatenate([k, k]))
        for field in Decisions.__dataclass_fields__:
            got, want = getattr(one, field), getattr(two, field)[:1]
            assert got.dtype == want.dtype, (trial, field)
            np.testing.assert_array_equal(got, want, err_msg=f"trial {trial}, {field}")
        np.testing.assert_array_equal(k_one, k_two[:1])
        # the rules by hand
        lim = guard.limits
        finite = bool(np.isfinite(ceps).all() and np.isfinite(level[0]) and np.isfinite(gain[0]) and gain[0] > 0 and np.isfinite(a).all())
        max_k = np.max(np.abs(np.where(np.isfinite(k), k, 0.0)))
        mismatch = np.inf
        if finite:
            f = np.arange(10, 109) * 31.25  # the 31.25 Hz bins from 300 to 3400 Hz
            d = 20 * np.log10(np.abs(signal.freqz([1.0], a[0], worN=f, fs=16000)[1])) - 20 * np.log10(np.abs(signal.freqz([1.0], hop_nb[0], worN=f, fs=8000)[1]))
            mismatch = np.sqrt(np.mean((d - d.mean()) ** 2))
        want = (0 if finite else Check.NONFINITE) | (Check.UNSTABLE if finite and not max_k < 1 - lim.stability_margin else 0)
        want |= Check.LEVEL if np.isfinite(level[0]) and not lim.level_min_db <= level[0] <= lim.level_max_db else 0
        want |= Check.MISMATCH if finite and mismatch > lim.mismatch_max_db else 0
        want |= Check.NOVEL if novelty[0] > lim.novelty_max else 0
        assert one.reasons[0] == want, (trial, one.reasons[0], want)
        for check in seen:
            seen[check][bool(want & check)] += 1
        assert one.max_k[0] == max_k
        np.testing.assert_allclose(one.mismatch_db[0], mismatch, rtol=1e-5, atol=1e-5)  # logarithms in single precision
    assert guard.assess(**kw, k=k)[0].rejected.dtype == bool
    assert all(min(n) >= 10 for n in seen.values()), seen  # every check both passes and fails, often


def test_counts_in_messages_agree_in_number():
    """Messages say '1 hop' and '2 hops', never '1 hops' or 'hop(s)'."""
    from nenv.chain.guard import summary_line
    from nenv.words import count

    assert (count(1, "hop"), count(0, "hop"), count(2, "sample"), count(1, "bad sample")) == ("1 hop", "0 hops", "2 samples", "1 bad sample")
    assert summary_line(1, 0, {}) == "guard: the one hop passed; none fell back to the codebook"
    assert summary_line(5, 0, {}) == "guard: all 5 hops passed; none fell back to the codebook"
    assert summary_line(1, 1, {"level": 1}).startswith("guard: 1 of 1 hop (100.0%) fell back")
    # the share is rejected / hops, and every reason is listed with its count, in the order given
    assert summary_line(8, 3, {"level": 2, "novel": 1}) == "guard: 3 of 8 hops (37.5%) fell back to the codebook (level 2, novel 1)"


def test_limits_read_from_a_model_folder_refuse_unknown_and_missing_keys():
    """A model folder's guard limits have exactly the known keys; the four learnt ones are required,
    and a folder without ``stability_margin`` gets the margin training writes by default."""
    from nenv.chain.guard import GuardLimits
    from nenv.errors import ConfigError
    from nenv.train.recipe import Recipe

    learnt = dict(level_min_db=-60.0, level_max_db=20.0, mismatch_max_db=9.0, novelty_max=1.5)
    limits = GuardLimits.from_dict(learnt)
    assert limits.stability_margin == Recipe.stability_margin == 1e-3
    assert (limits.low_min_db, limits.low_max_db) == (None, None)
    assert GuardLimits.from_dict(limits.to_dict()) == limits
    with pytest.raises(ConfigError, match="exactly the keys"):
        GuardLimits.from_dict({**learnt, "level_max": 20.0})  # a misspelt key, all required ones present
    for key in learnt:
        with pytest.raises(ConfigError, match="exactly the keys"):
            GuardLimits.from_dict({k: v for k, v in learnt.items() if k != key})


def test_codebook_cell_and_novelty_by_hand():
    # Two cells in a 2-feature space normalised by mean (1, 2) and std (2, 0.5). The raw point (7, 4)
    # normalises to (3, 4): nearest cell (0, 0) at distance 5, i.e. 5 / sqrt(2) per dimension (RMS);
    # (-7, 2.5) normalises to (-4, 1): nearest cell (-4, 0), distance 1 -> 1 / sqrt(2). Non-finite
    # features are far from every cell (novel), never an error.
    from nenv.chain.estimators.codebook import Codebook

    book = Codebook(np.array([1.0, 2.0]), np.array([2.0, 0.5]), np.array([[0.0, 0.0], [-4.0, 0.0]]), np.zeros((2, 3)), np.zeros((2, 17)), np.zeros(2), 1.0)
    cell, dist = book.nearest(np.array([[7.0, 4.0], [-7.0, 2.5], [np.nan, 2.0]]))
    np.testing.assert_array_equal(cell[:2], [0, 1])
    np.testing.assert_allclose(dist[:2], [5 / np.sqrt(2), 1 / np.sqrt(2)], rtol=1e-12)
    assert dist[2] > 1e5


def test_codebook_fit_finds_clusters_whose_features_differ_in_scale():
    # Four well-separated clusters of training hops in 3 features whose scales differ 1000-fold (as
    # energy in dB and cepstra do). The fitted book must put every hop in its own cluster's cell when
    # asked with raw features (k-means on the normalised features, centroids kept normalised), hold
    # each cluster's mean cepstrum and median level, and set the novelty limit at the 99.9th percentile
    # of the training hops' distances (numpy.percentile). Exactly `size` hops is enough; one fewer is
    # a ConfigError naming the count.
    from nenv.chain.estimators.codebook import Codebook
    from nenv.errors import ConfigError

    rng = np.random.default_rng(3)
    centres = np.array([[0.0, 0.0, 0.0], [1.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]]) * [100.0, 1.0, 0.1]
    truth = np.repeat(np.arange(4), 50)
    feats = centres[truth] + rng.normal(0.0, 0.03, (200, 3)) * [100.0, 1.0, 0.1]
    ceps = rng.normal(0.0, 0.1, (200, 20)) + truth[:, None] * 0.05
    level = rng.normal(-20.0, 3.0, 200) + 5.0 * truth
    book = Codebook.fit(feats, ceps, level, size=4, seed=0)
    cell, dist = book.nearest(feats)
    for c in range(4):
        mine = cell == cell[truth == c][0]
        np.testing.assert_array_equal(mine, truth == c)
        np.testing.assert_allclose(book.ceps[cell[truth == c][0]], ceps[truth == c].mean(axis=0), rtol=1e-12)
        assert book.level_db[cell[truth == c][0]] == pytest.approx(np.median(level[truth == c]), rel=1e-12)
    assert book.novelty_limit == pytest.approx(np.percentile(dist, 99.9), rel=1e-12)
    assert Codebook.fit(feats[:4], ceps[:4], level[:4], size=4, seed=0).centroids.shape == (4, 3)
    with pytest.raises(ConfigError, match="size=5 needs at least that many training hops, got 4"):
        Codebook.fit(feats[:4], ceps[:4], level[:4], size=5, seed=0)


def test_band_bins_include_both_edges_and_refuse_an_empty_band():
    """The rfft grid of 512 points at 16 kHz has a bin every 31.25 Hz (numpy.fft.rfftfreq)."""
    assert cepstrum.band_bins(300.0, 3400.0, n_fft=512, sr=16000) == (10, 108)  # 312.5 .. 3375 Hz
    assert cepstrum.band_bins(62.5, 4000.0, n_fft=512, sr=16000) == (2, 128)  # both edges on a bin: both in
    with pytest.raises(ValueError, match="no bin"):
        cepstrum.band_bins(40.0, 60.0, n_fft=512, sr=16000)  # between 31.25 and 62.5 Hz


def test_hops_of_digital_silence_are_never_rejected(arctic_refs, monkeypatch):
    # A muted stretch of a call has nothing to judge and nothing to add: a hop whose whole analysis
    # frame is digital zero passes with no reason, even when the network's prediction for it would
    # fail a check (here +90 dB of level on every hop); every hop of speech around it is rejected.
    from nenv.chain import checkpoint, pipeline
    from nenv.chain.guard import Check
    from nenv.dsp import channel
    from nenv.settings import HOP_NB, WIN_NB
    from tests.conftest import perturb_predictions

    ck = checkpoint.load(checkpoint.default_path())
    perturb_predictions(ck, {Check.LEVEL: range(10**6)}, monkeypatch)
    _, ref = arctic_refs[0]
    x = channel.telephone(ref, sr=16000)
    x[8000:12000] = 0.0  # 0.5 s of digital silence
    system = pipeline.make_system("neural", model=ck)
    pipeline.extend(x, system=system)
    dec = system.estimator.record()
    ends = (np.arange(dec.rejected.size) + 1) * HOP_NB  # hop t's frame: the WIN_NB samples before ends[t]
    muted = (ends - WIN_NB >= 8000) & (ends <= 12000)
    frames = lpc.frame(np.concatenate([x, np.zeros(ends[-1] - x.size)]), frame_length=WIN_NB, hop_length=HOP_NB)  # with the end padding
    speech = np.mean(frames**2, axis=1) > 1e-8  # above -80 dB: far from the -100 dB floor
    assert muted.sum() == (4000 - WIN_NB) // HOP_NB + 1 and speech.sum() > 200
    assert not dec.rejected[muted].any() and not dec.reasons[muted].any()
    assert dec.rejected[speech].all() and np.all(dec.reasons[speech] & Check.LEVEL)


def test_codebook_envelopes_carry_their_cells_level_and_silence_none():
    # The fallback envelope of a cell for a hop of narrowband power P (dB) has P + the cell's level in
    # 3.4-8 kHz: the power of G/A on the 512-point grid by scipy.signal.freqz, summed over the band's
    # bins (Parseval, one-sided). A hop of digital silence gets no band at all (gain exactly 0).
    from nenv.chain import checkpoint
    from nenv.chain.estimators.base import NarrowbandAnalysis
    from nenv.chain.estimators.codebook import CodebookEstimator
    from nenv.settings import NB_ORDER, WIN_NB

    book = checkpoint.load(checkpoint.default_path()).codebook
    cells = np.array([0, 5, 17, book.centroids.shape[0] - 1])
    nb_db = np.array([-30.0, -45.0, -20.0, -60.0])
    a, gain = book.envelopes(cells, nb_db)
    for i, c in enumerate(cells):
        w, h = signal.freqz([gain[i]], a[i], worN=257, fs=16000, include_nyquist=True)
        band = np.sum(np.abs(h[w >= 3400]) ** 2) * 2 / 512
        assert 10 * np.log10(band) == pytest.approx(nb_db[i] + book.level_db[c], abs=1e-9)  # measured within 1e-14 dB
    silent = NarrowbandAnalysis(np.zeros((3, WIN_NB)), np.tile(np.r_[1.0, np.zeros(NB_ORDER)], (3, 1)), np.zeros(3))
    assert not CodebookEstimator(book).estimate(silent).gain.any()


def test_a_codebook_file_is_never_unpickled(tmp_path):
    # A model folder may come from anyone: numpy object arrays (pickles, which can run code when
    # loaded) in codebook.npz are refused, not loaded.
    from nenv.chain.estimators.codebook import Codebook
    from nenv.errors import ConfigError

    book = Codebook(np.zeros(2), np.ones(2), np.zeros((3, 2)), np.zeros((3, 4)), np.zeros((3, 17)), np.zeros(3), 1.0)
    book.save(tmp_path / "ok.npz")
    assert Codebook.load(tmp_path / "ok.npz").centroids.shape == (3, 2)
    parts = dict(np.load(tmp_path / "ok.npz"))
    parts["mean"] = np.array([0.0, 1.0], dtype=object)
    np.savez(tmp_path / "pickled.npz", **parts)
    with pytest.raises(ConfigError, match="cannot read the codebook"):
        Codebook.load(tmp_path / "pickled.npz")
