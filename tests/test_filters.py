"""The per-hop filter entry points against the public scipy.signal functions (a general-purpose reference)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import signal

from nenv import filters
from nenv.synthesis import SosStage, Upsampler, isolation_sos, upsampler_taps


def test_the_compiled_loops_are_in_use_with_this_scipy():
    # If a SciPy release moves them, nenv still works (public functions) but this tells us.
    assert filters.fast()


@pytest.mark.parametrize("use_fast", [True, False])
def test_iir_and_sos_equal_lfilter_and_sosfilt(rng, monkeypatch, use_fast):
    monkeypatch.setitem(filters._checked, "ok", use_fast)
    x = rng.standard_normal((4, 333))
    b, a = np.array([1.0, -1.0]), np.array([1.0, -0.99])
    zi = rng.standard_normal((4, 1))
    y, zf = filters.iir(b, a, x, zi)
    want_y, want_zf = signal.lfilter(b, a, x, axis=-1, zi=zi)
    np.testing.assert_array_equal(y, want_y)
    np.testing.assert_array_equal(zf, want_zf)
    sos = isolation_sos()
    zs = rng.standard_normal((4, sos.shape[0], 2))
    y, zf = filters.sos(sos, x, zs)
    want_y, want_zf = signal.sosfilt(sos, x, axis=-1, zi=np.moveaxis(zs, 1, 0))
    np.testing.assert_array_equal(y, want_y)
    np.testing.assert_array_equal(zf, np.moveaxis(want_zf, 0, 1))


def test_sos_stage_in_pieces_equals_sosfilt_at_once(rng):
    x = rng.standard_normal(1000)
    stage = SosStage(isolation_sos())
    got = np.concatenate([stage.process(x[s : s + n]) for s, n in ((0, 1), (1, 160), (161, 839))])
    np.testing.assert_allclose(got, signal.sosfilt(isolation_sos(), x), rtol=0, atol=1e-13)


def test_upsampler_in_any_pieces_equals_zero_insertion_and_the_fir(rng):
    # Reference: the definition, zero insertion then scipy.signal.lfilter with the interpolation taps.
    x = rng.standard_normal(1200)
    z = np.zeros(2 * x.size)
    z[::2] = x
    want = signal.lfilter(upsampler_taps(), [1.0], z)
    for pieces in ([1200], [80] * 15, [7, 73, 0, 160, 1, 79, 880]):
        up = Upsampler()
        bounds = np.cumsum([0] + pieces)
        got = np.concatenate([up.process(x[s:e]) for s, e in zip(bounds[:-1], bounds[1:])])
        np.testing.assert_allclose(got, want, rtol=0, atol=1e-13)


def test_einsum_entry_is_numpys_compiled_loop_and_equals_numpy_einsum(rng):
    # Reference: the public numpy.einsum, for the contractions nenv's per-hop loops use.
    assert filters.einsum is not np.einsum  # with this numpy the compiled entry point is found and agrees
    cases = [("ib,ib->b", (16, 7)), ("jn,jn->n", (10, 300)), ("jt,jt->t", (1, 5)), ("...n,...n->...", (3, 4, 50))]
    for subscripts, shape in cases:
        x, y = rng.standard_normal(shape), rng.standard_normal(shape)
        np.testing.assert_array_equal(filters.einsum(subscripts, x, y), np.einsum(subscripts, x, y))
    x, y = rng.standard_normal((16, 40)), rng.standard_normal((40, 9))
    out = np.empty(9)
    assert filters.einsum("ib,ib->b", x[:16, :9], y[3:19], out=out) is out
    np.testing.assert_array_equal(out, np.einsum("ib,ib->b", x[:16, :9], y[3:19]))
