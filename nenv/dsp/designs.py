"""The fixed filters of the chain, designed once and kept here as numbers.

Each is designed by a function beside the code that uses it, with scipy.signal (the recipe is
there): :func:`nenv.dsp.synthesis.design_upsampler` (the 8 -> 16 kHz interpolator),
:func:`nenv.dsp.synthesis.design_isolation` (the high band's isolation filter),
:func:`nenv.dsp.synthesis.design_low_band` (the low band's) and
:func:`nenv.chain.estimators.imaging.design_shaping` (the imaging baseline's shaping FIR). The chain
reads the stored numbers, so a process needs no filter design before its first hop (importing
scipy.signal alone takes some 0.4 s of a 2 s ``nenv extend``), and its output does not move when a
new scipy designs a filter a few units in the last place differently. ``tests/test_designs.py`` holds
each stored design against a fresh one; ``python -m nenv.dsp.designs`` prints the table afresh (to
paste here after a recipe changes).
"""

from __future__ import annotations

import numpy as np

STORED = {
    "upsampler": [
        0.0010429566541470406, 0.005352890558868039, 0.004360933888824324, -0.004116830859663589,
        -0.0064647871698271285, 0.005631071090653745, 0.010539976176904761, -0.007296850161685611,
        -0.01640384645257005, 0.009025640694136377, 0.024495466764124296, -0.010764874267079899,
        -0.035668287661781733, 0.012421512913426077, 0.05147297573383028, -0.013918439066311732,
        -0.07524153591563053, 0.015181341873095094, 0.11570317707888458, -0.016135491958972827,
        -0.20506703043429644, 0.016731053809302794, 0.634211186565324, 0.9830652924167441,
        0.634211186565324, 0.016731053809302794, -0.20506703043429644, -0.016135491958972827,
        0.11570317707888458, 0.015181341873095094, -0.07524153591563053, -0.013918439066311732,
        0.05147297573383028, 0.012421512913426077, -0.035668287661781733, -0.010764874267079899,
        0.024495466764124296, 0.009025640694136377, -0.01640384645257005, -0.007296850161685611,
        0.010539976176904761, 0.005631071090653745, -0.0064647871698271285, -0.004116830859663589,
        0.004360933888824324, 0.005352890558868039, 0.0010429566541470406,
    ],
    "isolation": [
        [0.04048976382343682, -0.0751774252156119, 0.04048976382343681, 1.0, 0.6133819665487387, 0.19719225496654066],
        [1.0, -1.2021807610377044, 0.9999999999999998, 1.0, 0.13450805232269275, 0.5498375371499832],
        [1.0, -0.7728427808721574, 0.9999999999999998, 1.0, -0.2176274701106895, 0.8102143601908829],
        [1.0, -0.5941082284669956, 0.9999999999999998, 1.0, -0.3752236878858555, 0.9299938028761027],
        [1.0, -0.5340853217914484, 0.9999999999999998, 1.0, -0.4321768345258012, 0.9825413817580293],
    ],
    "low_band": [
        [0.0009915368761503763, -0.001827490013640049, 0.0009915368761503765, 1.0, -1.940712450469173, 0.9423959872097916],
        [1.0, -1.9750976438668364, 0.9999999999999998, 1.0, -1.9607040230808785, 0.9661034083528542],
        [1.0, -1.985432243841828, 0.9999999999999998, 1.0, -1.9775422046727484, 0.985951060487281],
        [1.0, -1.9876303816374046, 0.9999999999999998, 1.0, -1.986753342783482, 0.9964283163064177],
        [0.9189328356443135, -1.8378314530974913, 0.9189328356443133, 1.0, -1.9521830615625764, 0.9533937727052011],
        [1.0, -1.999815493367682, 1.0000000000000002, 1.0, -1.993460778554215, 0.9939822475477806],
    ],
    "shaping": [
        0.1277295199850459, 0.04707275813795052, -0.020820914939406264, 0.004812254871799106,
        -0.0010941896702738076, 0.0020482196776283055, -0.001848549050531029, 0.0006520414303793607,
        -0.00019695966606704475, 0.00036656222120680197, -0.0003397396143351226, 0.00011700525269380668,
        -3.1318542412630355e-05, 5.974348239830347e-05, -5.3348615150793075e-05, 1.605170873330939e-05,
        1.744924770622228e-18,
    ],
}


def stored(name: str) -> np.ndarray:
    """The stored design ``name`` as a new float64 array (FIR taps, or second-order sections)."""
    return np.array(STORED[name], dtype=np.float64)


def designers() -> dict:
    """Each stored design's name and the function that designs it afresh."""
    from nenv.chain.estimators.imaging import design_shaping
    from nenv.dsp.synthesis import design_isolation, design_low_band, design_upsampler

    return {"upsampler": design_upsampler, "isolation": design_isolation, "low_band": design_low_band, "shaping": design_shaping}


def table() -> str:
    """The body of :data:`STORED` from fresh designs (``repr`` of a float gives back the same float)."""
    lines = []
    for name, design in designers().items():
        v = np.asarray(design(), dtype=np.float64)
        if v.ndim == 1:  # FIR taps, four to a line
            rows = [", ".join(repr(float(x)) for x in v[i : i + 4]) for i in range(0, v.size, 4)]
        else:  # second-order sections, one to a line
            rows = ["[" + ", ".join(repr(float(x)) for x in section) + "]" for section in v]
        body = ",\n        ".join(rows)
        lines.append(f'    "{name}": [\n        {body},\n    ],')
    return "\n".join(lines)


if __name__ == "__main__":
    print(table())
