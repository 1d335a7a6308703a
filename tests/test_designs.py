"""The chain's fixed filters are stored as numbers (nenv.dsp.designs): each equals a fresh design by
scipy.signal (remez, ellip, firwin2 + minimum_phase: a general-purpose reference library, run here
with the recipe beside the code that uses the filter), and extending speech needs no filter design."""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import pytest

from nenv.chain.estimators import imaging
from nenv.dsp import designs, synthesis

# each stored design and the recipe that designs it afresh (scipy.signal, beside the code using it)
DESIGNERS = {"upsampler": synthesis.design_upsampler, "isolation": synthesis.design_isolation, "low_band": synthesis.design_low_band, "shaping": imaging.design_shaping}


def table() -> str:
    """The body of nenv.dsp.designs.STORED from fresh designs (``repr`` of a float gives back the same float)."""
    lines = []
    for name, design in DESIGNERS.items():
        v = np.asarray(design(), dtype=np.float64)
        if v.ndim == 1:  # FIR taps, four to a line
            rows = [", ".join(repr(float(x)) for x in v[i : i + 4]) for i in range(0, v.size, 4)]
        else:  # second-order sections, one to a line
            rows = ["[" + ", ".join(repr(float(x)) for x in section) + "]" for section in v]
        body = ",\n        ".join(rows)
        lines.append(f'    "{name}": [\n        {body},\n    ],')
    return "\n".join(lines)


def test_the_printed_table_reads_back_as_the_stored_one():
    assert set(DESIGNERS) == set(designs.STORED)
    printed = eval("{" + table() + "}")  # noqa: S307 - the table this file printed, as Python literals
    for name, values in designs.STORED.items():
        np.testing.assert_allclose(np.array(printed[name]), np.array(values), rtol=1e-9, atol=1e-13)


@pytest.mark.parametrize("name", ["upsampler", "isolation", "low_band", "shaping"])
def test_each_stored_design_equals_a_fresh_one(name):
    fresh = np.asarray(DESIGNERS[name](), dtype=np.float64)
    kept = designs.stored(name)
    assert kept.shape == fresh.shape
    # equal here to the last bit; a later scipy may design a few units in the last place apart
    np.testing.assert_allclose(kept, fresh, rtol=1e-9, atol=1e-13, err_msg=f"scipy now designs '{name}' differently: python tests/test_designs.py")
    kept[...] = 0.0  # each caller gets its own copy: changing one changes no other
    assert designs.stored(name).any()


def test_the_chain_reads_the_stored_designs():
    for used, name in ((synthesis.upsampler_taps(), "upsampler"), (synthesis.isolation_sos(), "isolation"), (synthesis.low_band_sos(), "low_band"), (imaging.shaping_taps(), "shaping")):
        np.testing.assert_array_equal(used, designs.stored(name))
    other = imaging.shaping_taps(-10.0, -30.0)  # gains other than the baseline's are designed when asked for
    np.testing.assert_array_equal(other, imaging.design_shaping(-10.0, -30.0))
    assert other.shape == designs.stored("shaping").shape and not np.allclose(other, designs.stored("shaping"))


def test_extending_speech_designs_no_filter():
    """Importing scipy.signal takes some 0.4 s: a process that extends speech never needs it."""
    code = (
        "import sys, numpy as np\n"
        "from nenv.chain.pipeline import extend, make_system\n"
        "x = 0.1 * np.sin(np.arange(8000) * 0.3)\n"
        "for method in ('neural', 'imaging'):\n"
        "    extend(x, system=make_system(method, low_band=method == 'neural'))\n"
        "print('scipy.signal' in sys.modules)\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False", out.stdout + out.stderr


if __name__ == "__main__":  # python tests/test_designs.py: the table to paste into nenv/dsp/designs.py
    print(table())
