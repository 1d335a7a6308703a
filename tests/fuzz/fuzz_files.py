"""atheris target: any bytes, as an audio file, through ``nenv extend``'s file path.

Run: python tests/fuzz/fuzz_files.py CORPUS_DIR -runs=N   (tests/test_fuzz.py does, with a seed corpus)
Scratch files go to $NENV_FUZZ_WORK when set (the test gives its own temporary folder, which pytest
removes), otherwise to a new temporary folder that is left for inspection after a finding.

The property: reading and extending either raises nenv's own error type, or
writes a 16 kHz file exactly twice as long as the 8 kHz input, finite and
within full scale. Anything else (another exception, a crash, a hang, a bad
output) is a finding; atheris then exits non-zero and saves the input.
"""

import os
import sys
import tempfile

import atheris

with atheris.instrument_imports(include=["nenv"]):
    from nenv.serve import streamfile
    from nenv.errors import NenvError

import numpy as np
import soundfile as sf

WORK = os.environ.get("NENV_FUZZ_WORK") or tempfile.mkdtemp(prefix="nenv-fuzz-")
SRC = os.path.join(WORK, "in.bin")
DST = os.path.join(WORK, "out.wav")
OPTS = streamfile.Options(method="imaging", resample=True, mix=True)


def one_input(data: bytes) -> None:
    with open(SRC, "wb") as fh:
        fh.write(data)
    if os.path.exists(DST):
        os.unlink(DST)
    try:
        res = streamfile.extend_file(SRC, DST, OPTS)
    except NenvError:
        assert not os.path.exists(DST), "an error left an output behind"
        return
    y, sr = sf.read(DST)
    n_in = int(round(res.seconds * 8000))
    assert sr == 16000 and y.size == 2 * n_in, (sr, y.size, n_in)
    assert np.all(np.isfinite(y)) and np.max(np.abs(y), initial=0.0) <= 1.0


if __name__ == "__main__":
    atheris.Setup(sys.argv, one_input)
    atheris.Fuzz()
