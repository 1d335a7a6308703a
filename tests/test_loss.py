"""The training loss (nenv.train.model.training_loss), checked against its definitions.

The "spectrum" loss's shape term against the envelopes' own frequency responses (scipy.signal.freqz),
with cepstra taken by the FFT definition of the real cepstrum; the level term's minimiser against the
expectile's defining equation (Newey & Powell 1987, "Asymmetric least squares estimation and testing").
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import optimize, signal

torch = pytest.importorskip("torch")

from nenv.train.model import SHAPE_LOSS_POINTS, training_loss  # noqa: E402

N_CEPS = 20


def _envelope(rng, order=16, radius=(0.4, 0.85)):
    """A stable all-pole polynomial from random pole pairs."""
    r = rng.uniform(*radius, order // 2)
    theta = rng.uniform(0.05, np.pi - 0.05, order // 2)
    poles = np.concatenate([r * np.exp(1j * theta), r * np.exp(-1j * theta)])
    return np.real(np.poly(poles))


def _cepstra(a, n_fft=8192):
    """c_1..c_N of ln|1/A(e^jw)| = sum_n c_n cos(n w), by the FFT definition (twice the real cepstrum)."""
    _, h = signal.freqz([1.0], a, worN=n_fft // 2 + 1, include_nyquist=True)
    rc = np.fft.irfft(np.log(np.abs(h)), n_fft)
    return 2 * rc[1 : N_CEPS + 1]


def _tensor(rows):
    return torch.from_numpy(np.asarray(rows, dtype=np.float32))


def test_cepstra_loss_by_hand():
    loss = training_loss("cepstra", y_std=np.ones(N_CEPS + 1), level_weight=0.5, over_weight=4.0)
    target = np.random.default_rng(2).normal(0, 1, (2, N_CEPS + 1))
    pred = target.copy()
    pred[0, 0] += 1.0
    pred[1, 3] += 2.0  # cepstral errors: (1 + 4) / (2 * 20)
    pred[0, -1] += 1.0
    pred[1, -1] -= 2.0  # level: one over by 1 (weight 4), one under by 2 (weight 1)
    assert float(loss(_tensor(pred), _tensor(target))) == pytest.approx(5 / 40 + 0.5 * (4 * 1 + 4) / 2, rel=1e-6)


@pytest.mark.parametrize("kind", ["cepstra", "spectrum"])
@pytest.mark.parametrize("over_weight", [4.0, 12.0])
def test_a_constant_level_settles_on_the_expectile_below_the_mean(kind, over_weight):
    # The level minimising the loss over a sample is its tau-expectile, tau = 1 / (1 + over_weight):
    # the c with tau * sum_{y>c} (y - c) = (1 - tau) * sum_{y<c} (c - y) (the definition, solved by brentq).
    rng = np.random.default_rng(0)
    y = rng.gamma(2.0, 3.0, 400) - 6.0  # skewed, like level errors
    y_std = np.ones(N_CEPS + 1)
    y_std[-1] = 2.5
    loss = training_loss(kind, y_std=y_std, level_weight=1.0, over_weight=over_weight)
    target = np.zeros((y.size, N_CEPS + 1))
    target[:, -1] = y / y_std[-1]

    def at(c):
        pred = np.zeros_like(target)
        pred[:, -1] = c / y_std[-1]
        return float(loss(_tensor(pred), _tensor(target)))

    best = optimize.minimize_scalar(at, bounds=(y.min(), y.max()), method="bounded", options={"xatol": 1e-6}).x
    tau = 1 / (1 + over_weight)
    expectile = optimize.brentq(lambda c: tau * np.sum(np.maximum(y - c, 0)) - (1 - tau) * np.sum(np.maximum(c - y, 0)), y.min(), y.max())
    assert best == pytest.approx(expectile, abs=1e-3)
    assert expectile < np.mean(y) - 1.0


def test_spectrum_loss_shape_term_is_the_mean_removed_db_error_of_the_envelopes():
    rng = np.random.default_rng(1)
    a_t = [_envelope(rng) for _ in range(6)]
    a_p = [_envelope(rng) for _ in range(6)]
    c_t, c_p = np.array([_cepstra(a) for a in a_t]), np.array([_cepstra(a) for a in a_p])
    y_mean = np.concatenate([rng.normal(0, 0.3, N_CEPS), [-20.0]])
    y_std = np.concatenate([rng.uniform(0.05, 0.5, N_CEPS), [6.0]])
    level = rng.normal(-20, 5, 6)  # equal levels: the level term is zero
    norm = lambda c: (np.column_stack([c, level]) - y_mean) / y_std  # noqa: E731
    got = float(training_loss("spectrum", y_std=y_std, level_weight=1.0, over_weight=4.0)(_tensor(norm(c_p)), _tensor(norm(c_t))))

    w = np.pi * np.linspace(3400, 8000, SHAPE_LOSS_POINTS) / 8000
    db = lambda a: 20 * np.log10(np.abs(signal.freqz([1.0], a, worN=w)[1]))  # noqa: E731
    d = np.array([db(p) - db(t) for p, t in zip(a_p, a_t)])
    d -= d.mean(axis=1, keepdims=True)
    want = float(np.mean(d**2))
    assert want > 10.0  # the envelopes differ by several dB
    assert got == pytest.approx(want, rel=2e-3)  # float32 arithmetic and 20 cepstral terms


def test_spectrum_loss_weighs_the_level_in_db():
    # With equal shapes, a level 2 dB high costs level_weight * over_weight * 4 dB^2, 2 dB low
    # level_weight * 4 dB^2, whatever the level's normalisation.
    y_std = np.full(N_CEPS + 1, 0.2)
    y_std[-1] = 4.0
    loss = training_loss("spectrum", y_std=y_std, level_weight=0.5, over_weight=3.0)
    target = np.zeros((1, N_CEPS + 1))
    for dl, want in ((2.0, 0.5 * 3.0 * 4.0), (-2.0, 0.5 * 4.0)):
        pred = target.copy()
        pred[0, -1] = dl / y_std[-1]
        assert float(loss(_tensor(pred), _tensor(target))) == pytest.approx(want, rel=1e-5)


def test_an_unknown_loss_is_refused():
    with pytest.raises(ValueError, match="unknown loss"):
        training_loss("mse", y_std=np.ones(3), level_weight=1.0, over_weight=1.0)
