"""Today's outputs against the stored ones (tests/golden.py says what is stored and how to write it again).

This is a regression check of nenv against itself, not against an outside source: it fails when any
system's output changes, so that a change is always meant and said. The tolerance allows what differs
between machines, not between versions: the network runs in single precision (ONNX Runtime picks its
kernels by CPU), and perturbing its outputs by 1e-5 relative (about a hundred times single precision's
rounding) moved at most 1 of the 16-bit samples' steps, on 0.1% of the samples (measured on this clip).
"""

from __future__ import annotations

import numpy as np
import pytest

from tests import golden

MAX_STEP = 2  # the largest difference allowed in any sample, in 16-bit steps
MAX_SHARE = 0.005  # the largest share of samples allowed to differ at all


def difference(stored: np.ndarray, today: np.ndarray) -> str | None:
    """What differs between two 16-bit outputs beyond the tolerance, or None."""
    if stored.shape != today.shape:
        return f"{today.size} samples where {stored.size} were stored"
    d = np.abs(today.astype(np.int32) - stored.astype(np.int32))
    share = float(np.mean(d > 0))
    if d.max() > MAX_STEP or share > MAX_SHARE:
        first = int(np.argmax(d > 0))
        return f"{share:.2%} of the samples differ, by up to {d.max()} steps (the first at stored sample {first})"
    return None


@pytest.fixture(scope="module")
def today():
    return golden.outputs()


@pytest.fixture(scope="module")
def stored():
    with np.load(golden.STORE) as f:
        return {k: f[k] for k in f.files}


def test_the_store_holds_every_system_and_the_whole_lengths(stored, today):
    assert sorted(k for k in stored if k not in ("commit", "n")) == sorted(golden.SYSTEMS) == sorted(today)
    for name, y in today.items():
        assert y.size == int(stored["n"]) == 2 * 32000, name  # the clip is 4.0 s at 8 kHz: exactly twice as long at 16 kHz


@pytest.mark.parametrize("name", list(golden.SYSTEMS))
def test_every_systems_output_is_the_stored_one(name, stored, today):
    problem = difference(stored[name], golden.stretches(today[name]))
    assert problem is None, (
        f"{name}: {problem}, against the outputs stored at {stored['commit']}. If the change is meant, "
        "write them again with `python -m tests.golden` and say why in the commit message."
    )


def test_the_tolerance_sees_a_small_change_of_output(stored):
    """The check is tight enough to matter: the neural band 0.5 dB quieter, or the whole output one
    sample later, each fails it; one step of rounding on a few samples does not."""
    from nenv.chain import pipeline
    from nenv.dsp import channel
    from nenv.media import audio
    import soundfile as sf

    ref, sr = sf.read(golden.CLIP)
    x = channel.telephone(ref, sr=sr, law="mulaw")
    quieter = audio.to_int16(pipeline.extend(x, system=pipeline.make_system("neural", band_trim_db=-0.5)).y)
    assert difference(stored["neural"], golden.stretches(quieter)) is not None
    later = np.concatenate([[0], stored["neural"][:-1]]).astype(np.int16)
    assert difference(stored["neural"], later) is not None
    rounded = stored["neural"].copy()
    rounded[::500] += 1
    assert difference(stored["neural"], rounded) is None
    assert difference(stored["neural"], rounded[:-1]) is not None
