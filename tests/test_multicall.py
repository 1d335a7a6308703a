"""Many calls batched together give each call exactly its own engine's output."""

from __future__ import annotations

import numpy as np
import pytest

from nenv.dsp import channel
from nenv.chain import checkpoint, pipeline
from nenv.serve.multicall import MultiCallEngine
from nenv.serve.runtime import CallEngine
from tests.conftest import narrowed_guard


@pytest.fixture(scope="module")
def model():
    path = checkpoint.default_path()
    if path is None:
        pytest.skip("no default model")
    return checkpoint.load(path)


@pytest.fixture(scope="module")
def calls(arctic_refs):
    """Four different calls: two sentences, plain and mu-law, different lengths."""
    out = []
    for i, (_, ref) in enumerate(arctic_refs):
        for law in ("none", "mulaw"):
            x = channel.telephone(ref, sr=16000, law=law)
            out.append(x[: x.size - 333 * len(out)])
    return out


@pytest.fixture(scope="module")
def strict_model(model):
    """The shipped model with a narrowed guard: it rejects some of these calls' hops (the shipped one none)."""
    return narrowed_guard(model)


def _alone(model, x, chunks, method="neural"):
    eng = CallEngine(system=pipeline.make_system(method, model=model), keep_decisions=True)
    pos, out = 0, []
    for c in chunks:
        out.append(eng.feed(x[pos : pos + c]))
        pos += c
    out.append(eng.feed(x[pos:]))
    out.append(eng.flush())
    return np.concatenate(out), (eng.system.estimator.record() if method == "neural" else None)


@pytest.mark.parametrize("guard", ["shipped", "strict"])
def test_batched_calls_equal_their_own_engines(model, strict_model, calls, guard):
    model = strict_model if guard == "strict" else model
    rng = np.random.default_rng(0)
    engine = MultiCallEngine(model)
    outs = {i: [] for i in range(len(calls))}
    pos = [0] * len(calls)
    # calls join at different times and send chunks of random size
    start = [0, 3, 7, 12]
    step = 0
    while any(pos[i] < calls[i].size for i in range(len(calls))):
        for i, x in enumerate(calls):
            if step == start[i]:
                engine.open(str(i))
            if step >= start[i] and pos[i] < x.size:
                n = int(rng.integers(1, 400))
                engine.feed(str(i), x[pos[i] : pos[i] + n])
                pos[i] += n
        for cid, y in engine.step().items():
            outs[int(cid)].append(y)
        step += 1
    for i, x in enumerate(calls):
        stats = engine.stats(str(i))
        tail = engine.close(str(i))
        y = np.concatenate(outs[i] + [tail])
        ref, dec = _alone(model, x, [])
        assert y.shape == ref.shape == (2 * x.size,)
        np.testing.assert_allclose(y, ref, atol=1e-6)
        assert stats["rejected_hops"] == int(dec.rejected[: stats["hops"]].sum())
        if guard == "strict":
            assert 0 < stats["rejected_hops"] < stats["hops"]
    assert engine.calls == []


def test_one_bad_call_does_not_disturb_another(model, calls):
    engine = MultiCallEngine(model)
    engine.open("good")
    engine.open("bad")
    good = calls[0][:16000]
    bad = np.full(16000, np.nan)
    bad[::7] = np.inf
    engine.feed("good", good)
    engine.feed("bad", bad)
    y = engine.step()
    ref, _ = _alone(model, good, [])
    good_stats = {}
    tail = engine.close("good", stats=good_stats)
    np.testing.assert_allclose(np.concatenate([y["good"], tail]), ref, atol=1e-6)
    assert good_stats["bad_samples"] == 0 and good_stats["samples_in"] == 16000 and good_stats["samples_out"] == 32000
    bad_stats = engine.stats("bad")
    assert np.all(np.isfinite(y["bad"])) and bad_stats["bad_samples"] == 16000 and bad_stats["hops"] == 200  # 2 s of 10 ms hops
    silent, _ = _alone(model, np.zeros(16000), [])
    np.testing.assert_array_equal(y["bad"], silent[: y["bad"].size])  # its bad samples were taken as silence
    # a caller's mistakes are named, and leave the open calls alone
    for misuse in (lambda: engine.feed("good", np.zeros(80)), lambda: engine.close("nobody"), lambda: engine.stats("nobody")):
        with pytest.raises(KeyError, match="is not open"):
            misuse()
    with pytest.raises(ValueError, match="already open"):
        engine.open("bad")
    engine.feed("bad", good)
    assert engine.step()["bad"].size == 2 * good.size


@pytest.mark.parametrize("method", ["neural", "codebook", "imaging"])
def test_calls_of_different_lengths_stay_exact_while_others_idle(model, calls, method):
    """Calls that end at different times: steps where only some calls have hops queued update only
    their rows of the shared state, and a call that ends takes its rows away; every call still equals
    its own engine, whatever fills the band."""
    n_calls = 11
    xs = [calls[i % len(calls)][800 * i : 800 * i + 4000 + 37 * i] for i in range(n_calls)]
    engine = MultiCallEngine(model, method=method)
    for i in range(n_calls):
        engine.open(str(i))
    outs = {i: [] for i in range(n_calls)}
    for start in range(0, max(x.size for x in xs), 160):  # 20 ms packets: two hops per step
        for i, x in enumerate(xs):
            engine.feed(str(i), x[start : start + 160])
        for cid, y in engine.step().items():
            outs[int(cid)].append(y)
    for i, x in enumerate(xs):
        y = np.concatenate(outs[i] + [engine.close(str(i))])
        ref, _ = _alone(model, x, [], method)
        np.testing.assert_allclose(y, ref, atol=1e-6)


@pytest.mark.parametrize("n", [0, 3, 80, 161, 4000])
def test_a_closed_call_gave_twice_its_input_and_its_count_says_so(calls, n):
    """Whatever a call's length, even none: its whole output is twice its input, equal to its own
    engine's (feed and flush), and the count the engine reports at the end is what it returned."""
    engine = MultiCallEngine(method="imaging")
    engine.open("a")
    engine.feed("a", calls[0][:n])
    stats = {}
    y = np.concatenate([engine.step()["a"], engine.close("a", stats=stats)])
    alone = CallEngine(method="imaging")
    ref = np.concatenate([alone.feed(calls[0][:n]), alone.flush()])
    assert y.size == ref.size == 2 * n == stats["samples_out"] == alone.samples_out
    np.testing.assert_array_equal(y, ref)


def test_only_a_guarded_method_reports_rejected_hops():
    with pytest.raises(ValueError, match="no guard"):
        MultiCallEngine(method="imaging").on_rejected = print


@pytest.mark.parametrize("n_calls", [1, 2])
def test_many_calls_keep_no_verdicts_that_grow_with_their_length(strict_model, calls, n_calls):
    # A gateway's engine runs for months: the guard's verdicts of a round of many calls go to
    # on_rejected and nowhere else (one call's per-hop record and listener are CallEngine's), so
    # nothing the engine holds grows with the calls' length, even while hops are rejected, also
    # at a quiet hour with a single call open.
    engine = MultiCallEngine(strict_model)
    est = engine.system.estimator
    one_call = []
    est.listener = lambda *args: one_call.append(args)
    reported = []
    engine.on_rejected = lambda call_id, first_hop, dec, *_: reported.append(int(dec.rejected.sum()))
    for i in range(n_calls):
        engine.open(str(i))
    for s in range(0, 16000, 160):
        for i in range(n_calls):
            engine.feed(str(i), calls[i][s : s + 160])
        engine.step()
    assert sum(reported) > 0  # the narrowed guard rejected hops, and they were reported
    assert len(est.record().rejected) == 0
    if n_calls > 1:  # (with one row the estimator cannot tell the engines apart; its listener is CallEngine's)
        assert one_call == []


def test_a_warm_up_step_leaves_nothing_behind(arctic_refs):
    """warm_up() does a first step's one-off work before any call and leaves no trace: a call after it
    comes out exactly as from an engine that never warmed up."""
    model = checkpoint.load(checkpoint.default_path())
    x = channel.telephone(arctic_refs[0][1], sr=16000, law="mulaw")[:8000]
    outs = []
    for warm in (True, False):
        engine = MultiCallEngine(model)
        if warm:
            engine.warm_up()
            assert engine.calls == []
        engine.open("a")
        engine.feed("a", x)
        outs.append(np.concatenate([engine.step()["a"], engine.close("a")]))
    np.testing.assert_array_equal(outs[0], outs[1])
    engine.open("b")
    with pytest.raises(ValueError, match="before any call"):
        engine.warm_up()


def test_a_warm_up_runs_the_network_on_one_packet_of_silence(model):
    """What warm_up() is for: the network's first batched run (and the kernels' first calls) happen
    before any caller waits, on one 20 ms packet (two hops) of one silent row, whose end is then
    flushed (one hop of tail padding) like any closing call's."""
    engine = MultiCallEngine(model)
    est = engine.system.estimator
    seen, estimate = [], est.estimate
    est.estimate = lambda analysis, *args: seen.append((analysis.rows, len(analysis))) or estimate(analysis, *args)
    engine.warm_up()
    assert seen == [(1, 2), (1, 1)] and engine.calls == []

