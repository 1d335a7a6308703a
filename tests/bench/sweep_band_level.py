"""How the measures move when the added band is made quieter: WB-PESQ against LSD and level error.

Run: python tests/bench/sweep_band_level.py

For the neural and oracle systems on both CMU ARCTIC sentences (no channel and
G.711 mu-law), the added band (output minus the unextended output) is scaled by
0, -3, -6, -10, -20 and -40 dB and every output is scored. Means over the two
sentences. The README's "Measured quality" quotes this table. Not a test; the
property it shows (WB-PESQ rises as the oracle's correct band is trimmed) is
checked in tests/test_measures.py.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from nenv.dsp import channel
from nenv.report import measures
from nenv.chain import pipeline
from nenv.report.evaluate import prepare_reference

DATA = Path(__file__).resolve().parents[1] / "data"
TRIMS_DB = (0, -3, -6, -10, -20, -40)


def main() -> None:
    refs = [prepare_reference(DATA / n) for n in ("arctic_a0007.wav", "arctic_a0009.wav")]
    model = pipeline.load_model()
    print(f"{'channel':<8} {'system':<8} {'trim dB':>7} {'WB-PESQ':>8} {'(unextended)':>13} {'LSD 3.4-8k':>11} {'level err':>10}")
    for law in ("none", "mulaw"):
        for name in ("neural", "oracle"):
            parts = []
            for ref in refs:
                nb = channel.telephone(ref, sr=16000, law=law, level_dbov=None)
                base = pipeline.extend(nb, system=pipeline.make_system("unextended")).y
                y = pipeline.extend(nb, system=pipeline.make_system(name, reference=ref, model=model)).y
                parts.append((ref, base, y - base))
            plain = np.mean([measures.pesq_wb(r, b) for r, b, _ in parts])
            for trim in TRIMS_DB:
                g = 10 ** (trim / 20)
                outs = [(r, b + h * g) for r, b, h in parts]
                pesq = np.mean([measures.pesq_wb(r, y) for r, y in outs])
                lsd = np.mean([measures.lsd(r, y, band=measures.HIGH_BAND) for r, y in outs])
                err = np.mean([measures.high_band_level_error(r, y) for r, y in outs])
                print(f"{law:<8} {name:<8} {trim:>7} {pesq:>8.2f} {plain:>13.2f} {lsd:>11.2f} {err:>+10.2f}")


if __name__ == "__main__":
    main()
