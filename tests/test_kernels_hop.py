"""The compiled kernels of a hop's estimate (features, context, codebook cell, envelope) against plain
numpy references written from their definitions, on random batches and edge rows.

References: numpy.fft (the envelope's band power and the voicing's autocorrelation), numpy.correlate,
numpy.signbit, numpy.log10 and brute-force distances; the always-stable route of
nenv.dsp.cepstrum (numpy matrix products, itself tested against the FFT definition in test_lpc).
"""

from __future__ import annotations

import numpy as np
import pytest

from nenv.chain import features
from nenv.dsp import cepstrum, kernels, lpc
from nenv.settings import BAND_EDGE_HZ, HOP_NB, WB_SR, WIN_NB


def _predictions(rng, n):
    ceps = rng.normal(0, 0.4, (n, 20)) / np.arange(1, 21) ** 0.7
    return ceps, rng.normal(-20, 6, n), rng.normal(-35, 12, n)


def test_envelope_kernels_equal_the_always_stable_route_and_meet_the_level(rng):
    ceps, level, energy = _predictions(rng, 300)
    a, gain, k = features.envelope_from_prediction(ceps, level, energy, order=16, with_reflection=True)
    # reference 1: cepstrum.from_cepstrum_stable (numpy matrix products) and its power spectrum
    c = np.concatenate([np.zeros((300, 1)), ceps], axis=1)
    a_ref, g0, k_ref = cepstrum.from_cepstrum_stable(c, order=16, with_reflection=True)
    np.testing.assert_allclose(a, a_ref, rtol=1e-12, atol=1e-13)
    np.testing.assert_allclose(k, k_ref, rtol=1e-12, atol=1e-13)
    # reference 2, the definition of the gain: G^2 / |A|^2 on the FFT grid (numpy.fft), summed over
    # the band's bins (one-sided, Parseval), equals the narrowband power times 10^(level / 10)
    spec = np.abs(np.fft.rfft(a, n=512, axis=1)) ** 2
    first, last = cepstrum.band_bins(BAND_EDGE_HZ, WB_SR / 2, n_fft=512, sr=WB_SR)
    band = 2.0 * (gain[:, None] ** 2 / spec[:, first : last + 1]).sum(axis=1) / 512
    np.testing.assert_allclose(10 * np.log10(band), energy + level, atol=1e-9)
    # the shape does not depend on the gain's inputs, and rows are independent (to rounding: BLAS
    # sums in another order for another number of rows)
    a2, gain2 = features.envelope_from_prediction(ceps[7:9], level[7:9] + 6.0, energy[7:9])
    np.testing.assert_allclose(a2, a[7:9], rtol=1e-13, atol=1e-15)
    np.testing.assert_allclose(gain2, gain[7:9] * 10 ** (6 / 20), rtol=1e-12)  # +6 dB of level: x2 in amplitude
    assert np.all(g0 > 0)


def test_envelope_kernels_edge_rows_nonfinite_and_absurd(rng):
    ceps, level, energy = _predictions(rng, 5)
    ceps[0, 3] = np.nan  # a non-finite coefficient counts as 0 (the guard rejects the hop anyway)
    ceps[1] = 0.0  # flat: A = 1
    ceps[2, 0] = 1e300  # absurd: the spectrum is floored, the envelope stays stable
    level[3] = np.inf  # a non-finite level gives a non-finite gain, never an exception
    a, gain, k = features.envelope_from_prediction(ceps, level, energy, with_reflection=True)
    c0 = ceps[0].copy()
    c0[3] = 0.0
    a0, _ = features.envelope_from_prediction(c0[None], level[:1], energy[:1])
    np.testing.assert_allclose(a[0], a0[0], rtol=1e-13, atol=1e-15)
    np.testing.assert_allclose(a[1], np.eye(1, 17)[0], atol=1e-12)
    assert np.all(np.abs(k[2]) < 1.0) and np.isfinite(a[2]).all()
    assert gain[3] == np.inf and np.isfinite(gain[[0, 1, 4]]).all()
    assert np.isnan(gain[2])  # its level overflows (inf x 0), as in the numpy route: the guard's "nonfinite"
    empty = features.envelope_from_prediction(np.zeros((0, 20)), np.zeros(0), np.zeros(0), with_reflection=True)
    assert [e.shape for e in empty] == [(0, 17), (0,), (0, 16)]


def test_hop_measures_equal_their_definitions(rng):
    frames = rng.standard_normal((40, WIN_NB)) * np.exp(rng.uniform(-12, 0, (40, 1)))
    frames[0] = 0.0  # digital silence
    frames[1, -HOP_NB - 1 :] = np.abs(frames[1, -HOP_NB - 1 :])  # no sign change in the hop
    frames[2, 5] = np.nan  # never reaches here from a file (input checks), but the peak stays numpy's
    frames[3:8] = rng.standard_normal((5, WIN_NB))  # loud enough that an error 75 dB below stays above the floor
    a, gain = lpc.analyse(frames, order=10, sr=8000)
    xw = frames * lpc.asymmetric_window(WIN_NB)
    power = np.sum(xw * xw, axis=1) / lpc.window_energy(WIN_NB)
    want_e = np.maximum(10 * np.log10(np.maximum(power, 1e-30)), -100.0)  # numpy.log10
    # gains that put the prediction gain on both sides of each end of its 0..60 dB range
    gain[3:8] = 10 ** ((want_e[3:8] - np.array([-5.0, 0.5, 59.5, 60.5, 75.0])) / 20)
    ceps, energy, pred, zcr, xn = kernels.hop_measures(frames, lpc.asymmetric_window(WIN_NB), a, gain, lpc.window_energy(WIN_NB), 10, HOP_NB, -100.0)
    np.testing.assert_allclose(energy, want_e, rtol=1e-13, atol=1e-12)
    want_err = np.maximum(10 * np.log10(np.maximum(gain**2, 1e-30)), -100.0)
    np.testing.assert_allclose(pred, np.clip(want_e - want_err, 0.0, 60.0), rtol=1e-12, atol=1e-11)
    hop = frames[:, -HOP_NB - 1 :]
    np.testing.assert_array_equal(zcr, (np.signbit(hop[:, 1:]) != np.signbit(hop[:, :-1])).sum(axis=1) / HOP_NB)  # numpy.signbit
    assert zcr[1] == 0.0 and energy[0] == -100.0 and pred[0] == 0.0
    np.testing.assert_allclose(pred[3:8], [0.0, 0.5, 59.5, 60.0, 60.0], atol=1e-9)
    peak = np.abs(xw).max(axis=1, keepdims=True)
    np.testing.assert_array_equal(xn, (xw / np.where(peak > 0, peak, 1.0)).astype(np.float32))
    np.testing.assert_array_equal(ceps, kernels.to_cepstrum(a, 10))


def test_voicing_equals_the_window_corrected_normalised_autocorrelation(rng):
    # reference: numpy.correlate in double precision on the windowed frame, each lag's normalised
    # value divided by the window's own (Boersma 1993); the kernel's single-precision FFT agrees to ~1e-6
    t = np.arange(WIN_NB) / 8000
    frames = np.stack([np.sin(2 * np.pi * 120 * t) + 0.3 * np.sin(2 * np.pi * 360 * t), rng.standard_normal(WIN_NB), np.zeros(WIN_NB), 1e-9 * rng.standard_normal(WIN_NB)])
    got = features.voicing(frames)
    w = lpc.asymmetric_window(WIN_NB)
    rw = np.correlate(w, w, "full")[WIN_NB - 1 :]
    want = []
    for f in frames:
        xw = f * w
        r = np.correlate(xw, xw, "full")[WIN_NB - 1 :]
        if r[0] <= 0:
            want.append(0.0)
            continue
        lo, hi = features.PITCH_LAGS
        want.append(float(np.clip(np.max(r[lo : hi + 1] / r[0] / (rw[lo : hi + 1] / rw[0])), 0.0, 1.0)))
    np.testing.assert_allclose(got, want, atol=2e-6)
    assert got[0] > 0.9 and got[1] < 0.5 and got[2] == 0.0
    np.testing.assert_allclose(got[3], want[3], atol=2e-6)  # scaled to unit peak: a quiet frame loses nothing


def test_voicing_peak_equals_the_numpy_formula_and_propagates_nan(rng):
    r = rng.normal(0, 1, (50, 148)).astype(np.float32)
    r[:, 0] = np.abs(r[:, 0]) + 0.5
    r[10:, 1:] *= 0.1  # most rows' peaks inside (0, 1), not clamped
    r[3, 0] = 0.0  # silence
    r[4, 60] = np.nan
    r[5, 1:] = 0.0
    r[5, 20] = 0.9 * r[5, 0] * 0.75  # the first lag is the peak (ratio[0] = 0.75 below)
    ratio = rng.uniform(0.5, 1.0, 128)
    ratio[0] = 0.75
    for row, lag in zip(range(6, 10), (21, 84, 146, 147)):  # the peak at the second, a middle and the last two lags
        r[row, 1:] = 0.0
        r[row, lag] = 0.6 * r[row, 0] * ratio[lag - 20]
    r[10, 1:] = -np.abs(r[10, 1:]) - 0.01  # every lag anti-correlated: no voicing, 0
    got = kernels.voicing_peak(r, ratio, 20, 147)
    r64 = r.astype(np.float64)
    norm = r64[:, 20:148] / np.where(r64[:, 0] > 0, r64[:, 0], 1.0)[:, None] / ratio[None, :]
    want = np.where(r64[:, 0] > 0, np.minimum(np.maximum(norm.max(axis=1), 0.0), 1.0), 0.0)
    np.testing.assert_array_equal(got[np.arange(50) != 4], want[np.arange(50) != 4])
    assert got[3] == 0.0 and np.isnan(got[4]) and np.isnan(want[4]) and got[5] == pytest.approx(0.9)
    np.testing.assert_allclose(got[6:10], 0.6, rtol=1e-6)
    assert got[10] == 0.0 and 0.0 < want[11:].min() and want[11:].max() < 1.0


@pytest.mark.parametrize("ready", [True, False])
def test_stack_context_equals_concatenated_history(rng, ready):
    B, H, d, ctx = 3, 5, 4, 2
    feats = rng.standard_normal((B, H, d))
    hist = rng.standard_normal((B, ctx * d))
    stacked, new_hist, flags = features.stack_context(hist, np.full(B, ready), feats, context=ctx)
    for b in range(B):
        past = hist[b].reshape(ctx, d) if ready else np.repeat(feats[b, :1], ctx, axis=0)
        line = np.concatenate([past, feats[b]])  # oldest first
        for h in range(H):
            np.testing.assert_array_equal(stacked[b * H + h], line[h : h + ctx + 1].ravel())
        np.testing.assert_array_equal(new_hist[b], line[-ctx:].ravel())
    assert flags.all()


def test_nearest_cell_equals_brute_force_distances(rng):
    from nenv.chain.estimators.codebook import Codebook

    d, K = 14, 32
    cents = rng.standard_normal((K, d))
    cents[9] = cents[5]  # a tie: the first cell wins, as numpy.argmin's
    book = Codebook(rng.normal(0, 2, d), rng.uniform(0.5, 2, d), cents, np.zeros((K, 20)), np.zeros((K, 17)), np.zeros(K), 3.0)
    feats = book.mean + book.std * (cents[rng.integers(0, K, 200)] + rng.normal(0, 0.6, (200, d)))
    feats[0, 2], feats[1, 5], feats[2, 0] = np.nan, np.inf, -np.inf
    feats[3] = book.mean + book.std * cents[9]
    feats[4:10] = book.mean + book.std * (cents[:6] + rng.normal(0, 0.05, (6, d)))  # close to a cell: squared distances under 1
    cell, dist = book.nearest(feats)
    z = np.nan_to_num((feats - book.mean) / book.std, nan=1e6, posinf=1e6, neginf=-1e6)
    full = np.linalg.norm(z[:, None, :] - cents[None, :, :], axis=2)  # every distance, numpy.linalg.norm
    np.testing.assert_array_equal(cell, full.argmin(axis=1))
    assert cell[3] == 5
    np.testing.assert_allclose(dist, full.min(axis=1) / np.sqrt(d), rtol=1e-9, atol=1e-7)  # row 3 sits on a cell: 0 to rounding
    assert cell.dtype == np.int64 and book.nearest(np.zeros((0, d)))[0].shape == (0,)


@pytest.mark.parametrize("hops_per_call", [1, 2, 5])  # fewer and more samples per call than the history holds
def test_frames_after_history_equal_numpy_framing_in_any_pieces(rng, hops_per_call):
    from nenv.dsp.rows import RowState

    hop, keep = 160, 320
    x = rng.standard_normal((3, 10 * hop))
    state = RowState(h=np.zeros(keep))
    state.add(3)
    step = hops_per_call * hop
    got = [state.frames("h", slice(None), x[:, s : s + step], hop=hop).reshape(3, hops_per_call, -1) for s in range(0, x.shape[1], step)]
    got = np.concatenate(got, axis=1)
    padded = np.concatenate([np.zeros((3, keep)), x], axis=1)
    want = np.stack([np.stack([padded[b, h * hop : h * hop + keep + hop] for h in range(10)]) for b in range(3)])  # numpy slicing
    np.testing.assert_array_equal(got, want)
    np.testing.assert_array_equal(state.get("h"), x[:, -keep:])  # the history ends where x ends
    picked = state.frames("h", np.array([2, 0]), x[[2, 0], :hop], hop=hop)  # some rows: the others keep their history
    np.testing.assert_array_equal(picked, np.stack([np.concatenate([x[2, -keep:], x[2, :hop]]), np.concatenate([x[0, -keep:], x[0, :hop]])]))
    np.testing.assert_array_equal(state.get("h")[1], x[1, -keep:])
    np.testing.assert_array_equal(state.get("h")[0], np.concatenate([x[0, -keep + hop :], x[0, :hop]]))


def test_low_band_level_equals_the_power_spectrum_summed_over_the_band(rng):
    from nenv.settings import LOW_BAND_HZ

    a = np.concatenate([np.ones((30, 1)), rng.normal(0, 0.3, (30, 16))], axis=1)
    gain = np.exp(rng.normal(-3, 1, 30))
    energy = rng.normal(-30, 8, 30)
    gain[0], gain[1], gain[2] = 0.0, np.inf, np.nan
    a[3, 5] = np.nan  # a non-finite envelope passes through as well (the guard's "nonfinite" rejects it)
    got = features.low_band_level(a, gain, energy)
    first, last = cepstrum.band_bins(LOW_BAND_HZ[0], LOW_BAND_HZ[1], n_fft=512, sr=WB_SR)
    spec = np.abs(np.fft.rfft(a, n=512, axis=1)[:, first : last + 1]) ** 2  # numpy.fft: |A|^2 on the band's bins
    with np.errstate(divide="ignore", invalid="ignore"):
        want = 10 * np.log10(2.0 * (gain[:, None] ** 2 / spec).sum(axis=1) / 512) - energy
    np.testing.assert_allclose(got[4:], want[4:], atol=1e-9)
    assert got[0] == -np.inf and got[1] == np.inf and np.isnan(got[2]) and np.isnan(got[3])


def test_low_band_weights_ramp_with_voicing_and_vanish_without_a_gain():
    from nenv.chain.systems import VOICING_GATE, low_band_weights
    from nenv.settings import LOW_BAND_GAIN_DB

    lo, hi = VOICING_GATE
    v = np.array([0.0, lo, (lo + hi) / 2, hi, 1.0, 0.9, 0.9, 0.9, 0.8, 0.2, np.nan])
    g = np.array([1.0, 1.0, 1.0, 1.0, 1.0, 0.0, np.inf, np.nan, 1.0, 1.0, 1.0])
    got = low_band_weights(v, g)
    top = 10 ** (LOW_BAND_GAIN_DB / 20)
    np.testing.assert_allclose(got[:10], [0.0, 0.0, 0.5 * top, top, top, 0.0, 0.0, 0.0, top, 0.0], rtol=1e-12, atol=1e-15)
    want = np.where(np.isfinite(g) & (g > 0), np.clip((v - lo) / (hi - lo), 0.0, 1.0) * top, 0.0)  # the numpy formula
    np.testing.assert_array_equal(got, want)
