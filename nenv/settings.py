"""Rates, frame geometry and model orders shared by every stage.

Every frame-based stage uses the same grid: frame ``t`` covers the hop of
input samples ``[t*HOP_NB, (t+1)*HOP_NB)`` and its analysis window *ends* at
the hop's last sample, so analysis needs no look-ahead.
"""

NB_SR = 8000  # Hz, narrowband (telephone) sample rate
WB_SR = 16000  # Hz, wideband sample rate
HOP_NB = 80  # samples = 10 ms at 8 kHz
HOP_WB = 160  # samples = 10 ms at 16 kHz
WIN_NB = 240  # samples = 30 ms at 8 kHz, asymmetric window ending at the hop end
WIN_WB = 480  # samples = 30 ms at 16 kHz, same shape as WIN_NB
NB_ORDER = 10  # LPC order of the narrowband envelope
WB_ORDER = 16  # LPC order of the wideband envelope
N_SUBFRAMES = 4  # synthesis sub-frames per hop (coefficient interpolation steps)
BAND_EDGE_HZ = 3400.0  # Hz, upper edge of the telephone band = lower edge of the added band
CHANNEL_LOW_HZ = 300.0  # Hz, lower edge of the telephone band
LOW_BAND_HZ = (50.0, 300.0)  # Hz, the low band that wideband telephony (ITU-T G.722) adds below the telephone band
FULL_SCALE = 1.0  # float sample value of digital full scale (0 dBFS)
LOW_BAND_GAIN_DB = 6.0  # dB, level trim of the synthesised low band (chosen on validation speakers by its level error, docs/2026-12-03-low-band.md)
