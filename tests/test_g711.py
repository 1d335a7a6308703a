"""G.711 companding against the Python standard library's audioop (3.11) and ITU-T G.711 code values."""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from nenv.dsp import g711

with warnings.catch_warnings():
    warnings.simplefilter("ignore", DeprecationWarning)
    import audioop  # reference implementation; deprecated in 3.11, removed in 3.13

ALL16 = np.arange(-32768, 32768, dtype=np.int16)
ALL_CODES = np.arange(256, dtype=np.uint8)


def test_alaw_encoder_matches_audioop_for_all_inputs():
    ref = np.frombuffer(audioop.lin2alaw(ALL16.tobytes(), 2), dtype=np.uint8)
    np.testing.assert_array_equal(g711.alaw_encode(ALL16), ref)


def test_mulaw_encoder_matches_audioop_for_non_negative_inputs():
    ref = np.frombuffer(audioop.lin2ulaw(ALL16.tobytes(), 2), dtype=np.uint8)
    ours = g711.mulaw_encode(ALL16)
    nonneg = ALL16 >= 0
    np.testing.assert_array_equal(ours[nonneg], ref[nonneg])


def test_mulaw_sign_convention_for_negative_inputs():
    # Documented in nenv.dsp.g711: sign-magnitude, code(-x) = code(x) with the sign bit cleared.
    x = np.arange(1, 32768)
    np.testing.assert_array_equal(g711.mulaw_encode(-x), g711.mulaw_encode(x) & 0x7F)
    assert g711.mulaw_encode(np.array([-32768]))[0] == g711.mulaw_encode(np.array([-32767]))[0]
    # audioop rounds negatives away from zero instead: never more than one code step apart.
    ref = np.frombuffer(audioop.lin2ulaw(ALL16.tobytes(), 2), dtype=np.uint8).astype(int)
    ours = g711.mulaw_encode(ALL16).astype(int)
    neg = ALL16 < 0
    assert np.max(np.abs(ours[neg] - ref[neg])) <= 1
    # decoded values differ by at most one quantisation step of their segment
    step = np.abs(np.diff(np.sort(g711.mulaw_decode(ALL_CODES).astype(int))))
    d = np.abs(g711.mulaw_decode(ours[neg]).astype(int) - g711.mulaw_decode(ref[neg]).astype(int))
    assert d.max() <= step.max()


@pytest.mark.parametrize("law, ref_fn", [("alaw", audioop.alaw2lin), ("mulaw", audioop.ulaw2lin)])
def test_decoders_match_audioop_for_all_codes(law, ref_fn):
    ref = np.frombuffer(ref_fn(ALL_CODES.tobytes(), 2), dtype=np.int16)
    ours = g711.alaw_decode(ALL_CODES) if law == "alaw" else g711.mulaw_decode(ALL_CODES)
    np.testing.assert_array_equal(ours, ref)


def test_code_values_for_zero_and_full_scale():
    # ITU-T G.711 Table 2a (mu-law): +0 -> 1111 1111, +full scale -> 1000 0000, -full scale -> 0000 0000.
    assert g711.mulaw_encode(np.array([0, 32767, -32768])).tolist() == [0xFF, 0x80, 0x00]
    # ITU-T G.711 Table 1a (A-law, even bits inverted): +0 -> 1101 0101, +full scale -> 1010 1010, -full scale -> 0010 1010.
    assert g711.alaw_encode(np.array([0, 32767, -32768])).tolist() == [0xD5, 0xAA, 0x2A]
    # Largest decoded magnitudes: 8031 x 4 = 32124 (mu-law), 4032 x 8 = 32256 (A-law) in 16-bit units.
    assert g711.mulaw_decode(np.array([0x80]))[0] == 32124
    assert g711.alaw_decode(np.array([0xAA]))[0] == 32256


def test_compand_is_idempotent_and_bounded(rng):
    y = rng.uniform(-1, 1, 10000)
    for law in ("mulaw", "alaw"):
        once = g711.compand(y, law=law)
        np.testing.assert_array_equal(g711.compand(once, law=law), once)
        assert np.max(np.abs(once)) <= 1.0
        # quantisation SNR of G.711 on a full-range uniform signal is well above 30 dB
        snr = 10 * np.log10(np.sum(y**2) / np.sum((once - y) ** 2))
        assert snr > 30


def test_compand_is_the_codecs_round_trip_and_none_rounds_to_16_bits(rng):
    """compand against audioop's encoder and decoder (A-law for every sample, mu-law where audioop's
    rounding agrees: non-negative samples; see the module doc); 'none' is 16-bit rounding alone:
    x 32768, half to even, saturated (the WAV convention of soundfile and scipy.io.wavfile)."""
    y = np.concatenate([rng.uniform(-1, 1, 5000), [-1.0, 0.0, 1.0, 0.5 / 32768, 1.5 / 32768]])
    q = np.clip(np.round(y * 32768), -32768, 32767).astype(np.int16)
    np.testing.assert_array_equal(g711.compand(y, law="none"), q / 32768.0)
    a = np.frombuffer(audioop.alaw2lin(audioop.lin2alaw(q.tobytes(), 2), 2), dtype=np.int16)
    np.testing.assert_array_equal(g711.compand(y, law="alaw"), a / 32768.0)
    u = np.frombuffer(audioop.ulaw2lin(audioop.lin2ulaw(q.tobytes(), 2), 2), dtype=np.int16)
    pos = q >= 0
    np.testing.assert_array_equal(g711.compand(y, law="mulaw")[pos], u[pos] / 32768.0)


def test_unknown_law_is_refused():
    from nenv.errors import InputError

    with pytest.raises(InputError, match="law"):
        g711.compand(np.zeros(4), law="ulaw")
