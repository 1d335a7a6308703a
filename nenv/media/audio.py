"""Load, validate, resample and write audio.

Samples are float64 in [-1, 1] (full scale = 1.0) inside nenv. Files are read
with soundfile (WAV, FLAC, Ogg/Vorbis and whatever libsndfile supports) and
written atomically: a temporary file in the destination folder is renamed over
the target only once it is complete, so a failed or interrupted run never
leaves a half-written output.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path
from contextlib import contextmanager
from typing import Callable, Iterator

import numpy as np

from nenv.words import count
from nenv.errors import InputError
from nenv.media.files import atomic_output, check_output
from nenv.settings import FULL_SCALE

SUPPORTED_SR = (4000, 192000)  # Hz, the range of input rates nenv will resample from


@dataclass(frozen=True)
class Audio:
    """A mono signal with its rate.

    y : np.ndarray [shape=(n,)], float64, full scale = 1.0
    sr : int > 0 [Hz]
    """

    y: np.ndarray
    sr: int

    @property
    def duration(self) -> float:
        """Length in seconds."""
        return self.y.size / self.sr


def load(path: str | os.PathLike, *, channel: int | None = None, mix: bool = False) -> Audio:
    """Read an audio file as a validated mono float64 signal.

    Parameters
    ----------
    path : path to a WAV, FLAC, Ogg or other libsndfile-readable file
    channel : int >= 0, optional. Which channel of a multichannel file to use.
    mix : bool. Average all channels instead of choosing one.

    Raises
    ------
    InputError
        Missing, unreadable, empty, multichannel without a choice, non-finite samples,
        or a rate outside ``SUPPORTED_SR``.
    """
    with Reader(path, channel=channel, mix=mix) as r:
        blocks = list(r.blocks())  # none when a header counts samples the file does not hold
        y = np.concatenate(blocks) if blocks else np.zeros(0)
    if y.size == 0:
        raise InputError(f"'{path}' holds no samples")
    return Audio(np.ascontiguousarray(y), r.sr)


class Reader:
    """An audio file read block by block as validated mono float64 (bounded memory for any length).

    Opening checks everything that can be checked up front (exists, is a file,
    is audio, has samples, has a supported rate, a channel choice for
    multichannel files); :meth:`blocks` checks each block for NaN/inf and names
    the time of the first bad sample. ``truncated`` holds a note when a WAV
    header promises more samples than the file holds (the samples present are
    used).
    """

    def __init__(self, path: str | os.PathLike, *, channel: int | None = None, mix: bool = False):
        import soundfile as sf

        p = Path(path)
        self.path = p
        if mix and channel is not None:
            raise InputError(f"--channel {channel} and --mix contradict each other: choose one channel, or the average of all")
        if not p.exists():
            raise InputError(f"input file '{p}' does not exist")
        if p.is_dir():
            raise InputError(f"'{p}' is a folder, not an audio file")
        if not os.access(p, os.R_OK):
            raise InputError(f"cannot read '{p}': permission denied")
        if p.stat().st_size == 0:
            raise InputError(f"'{p}' is empty (0 bytes)")
        try:
            self._fh = sf.SoundFile(str(p))
        except Exception as e:  # soundfile raises LibsndfileError, RuntimeError, TypeError
            raise InputError(f"cannot read '{p}' as audio: {_first_line(e)}") from e
        try:
            self.sr = int(self._fh.samplerate)
            self.frames = int(self._fh.frames)
            n_ch = self._fh.channels
            if self.frames <= 0:
                raise InputError(f"'{p}' holds no samples (a header without audio data)")
            if mix:
                self._pick = None
            elif channel is not None:
                if not 0 <= channel < n_ch:
                    raise InputError(f"channel={channel} does not exist: '{p}' has {count(n_ch, 'channel')}, numbered from 0")
                self._pick = channel
            elif n_ch > 1:
                raise InputError(f"'{p}' has {n_ch} channels: choose one with --channel N (0..{n_ch - 1}) or average them with --mix")
            else:
                self._pick = 0
            if not SUPPORTED_SR[0] <= self.sr <= SUPPORTED_SR[1]:
                raise InputError(f"'{p}': sr={self.sr} Hz is outside the supported range {SUPPORTED_SR[0]}..{SUPPORTED_SR[1]} Hz")
            self.truncated = _wav_truncation(p, self.frames)
        except BaseException:
            self._fh.close()
            raise
        self.frames_read = 0

    def blocks(self, size: int = 65536) -> Iterator[np.ndarray]:
        """Yield the whole file as mono float64 blocks of up to ``size`` samples."""
        while True:
            try:
                data = self._fh.read(size, dtype="float64", always_2d=True)
            except Exception as e:
                raise InputError(f"cannot read '{self.path}' after {self.frames_read / self.sr:.2f} s: {_first_line(e)} (the file is damaged)") from e
            if data.shape[0] == 0:
                return
            y = data.mean(axis=1) if self._pick is None else data[:, self._pick]
            finite = np.isfinite(y)
            if not np.all(finite):
                at = (self.frames_read + int(np.argmin(finite))) / self.sr
                raise InputError(f"'{self.path}': some samples are NaN or infinite (the first at {at:.3f} s)")
            self.frames_read += y.size
            yield np.ascontiguousarray(y)

    def close(self) -> None:
        self._fh.close()

    def __enter__(self) -> "Reader":
        return self

    def __exit__(self, *exc) -> None:
        self.close()


def _wav_truncation(path: Path, frames: int) -> str | None:
    """A note if a RIFF/WAVE header declares more audio than the file holds, else None."""
    try:
        with open(path, "rb") as fh:
            head = fh.read(1 << 16)
    except OSError:
        return None
    if len(head) < 12 or head[:4] != b"RIFF" or head[8:12] != b"WAVE":
        return None
    pos, block_align = 12, 0
    while pos + 8 <= len(head):
        cid, size = head[pos : pos + 4], int.from_bytes(head[pos + 4 : pos + 8], "little")
        if cid == b"fmt " and pos + 22 <= len(head):
            block_align = int.from_bytes(head[pos + 20 : pos + 22], "little")
        if cid == b"data":
            if block_align and size not in (0, 0xFFFFFFFF) and size // block_align > frames:
                return f"the header promises {size // block_align} samples, the file holds {frames}: it is truncated (the samples present are used)"
            return None
        pos += 8 + size + (size & 1)
    return None


def is_silent(y: np.ndarray) -> bool:
    """True if every sample is exactly zero (digital silence)."""
    return not np.any(y)


def resample(y: np.ndarray, *, orig_sr: int, target_sr: int) -> np.ndarray:
    """Resample with the soxr library's high-quality band-limited resampler.

    Parameters
    ----------
    y : np.ndarray [shape=(n,)]
    orig_sr, target_sr : int > 0 [Hz]

    Returns
    -------
    np.ndarray [shape=(round(n * target_sr / orig_sr),)], float64, delay-compensated
    """
    if orig_sr == target_sr:
        return np.asarray(y, dtype=np.float64)
    import soxr

    out = soxr.resample(np.asarray(y, dtype=np.float64), orig_sr, target_sr, quality="HQ")
    n_out = int(round(y.size * target_sr / orig_sr))
    if out.size < n_out:
        out = np.pad(out, (0, n_out - out.size))
    return out[:n_out]


def to_int16(y: np.ndarray) -> np.ndarray:
    """Float samples (full scale 1.0) -> int16: x 32768, rounded half to even, saturated at the rails.

    The one conversion nenv uses for every 16-bit output (files and streams), so
    a streamed call and the same call written by ``extend`` are bit-identical.
    """
    scaled = np.rint(np.asarray(y, dtype=np.float64) * 32768.0)  # rint: half to even, as np.round
    return np.minimum(np.maximum(scaled, -32768.0, out=scaled), 32767.0, out=scaled).astype(np.int16)


PEAK_CEILING = 0.99 * FULL_SCALE  # -0.09 dBFS: every output is limited here


def limit_peaks(y: np.ndarray, *, ceiling: float = PEAK_CEILING) -> tuple[np.ndarray, int]:
    """Clip samples beyond ``ceiling`` and count them.

    Returns
    -------
    y : np.ndarray [shape=(n,)], |y| <= ceiling
    n_limited : int, how many samples were changed
    """
    over = np.abs(y) > ceiling
    n = int(np.count_nonzero(over))
    if n:
        y = np.clip(y, -ceiling, ceiling)
    return y, n


_SUBTYPES = {".wav": "PCM_16", ".flac": "PCM_16", ".ogg": "VORBIS"}
AUDIO_SUFFIXES = tuple(_SUBTYPES)
READ_SUFFIXES = (".wav", ".flac", ".ogg", ".oga", ".aif", ".aiff", ".au", ".caf", ".w64", ".rf64", ".mp3")  # audio files nenv looks for in folders


def find_audio(folder: str | os.PathLike) -> list[Path]:
    """The audio files below ``folder`` (``READ_SUFFIXES``, any case), sorted; hidden files and
    folders (names starting with a dot) are skipped."""
    root = Path(folder)
    return [p for p in sorted(root.rglob("*")) if p.is_file() and p.suffix.lower() in READ_SUFFIXES and not any(part.startswith(".") for part in p.relative_to(root).parts)]


def write(path: str | os.PathLike, y: np.ndarray, *, sr: int, subtype: str | None = None) -> None:
    """Write ``y`` atomically (see :mod:`nenv.media.files`).

    Parameters
    ----------
    path : destination; the format follows the extension (.wav, .flac, .ogg)
    y : np.ndarray [shape=(n,)], float, full scale = 1.0; values are clipped to +-1
    sr : int > 0 [Hz]
    subtype : soundfile subtype, default 16-bit PCM (Vorbis for .ogg)

    Raises
    ------
    OutputError
        The folder does not exist, the extension is unknown, or writing failed.
    """
    with writer(path, sr=sr, subtype=subtype) as put:
        put(y)


@contextmanager
def writer(path: str | os.PathLike, *, sr: int, subtype: str | None = None) -> Iterator[Callable[[np.ndarray], None]]:
    """Write a mono file block by block, atomically: yields ``put(y)``; the file appears only if the block succeeds.

    Same format rules as :func:`write`; 16-bit output goes through :func:`to_int16`.
    """
    import soundfile as sf

    p = check_output(path, suffixes=AUDIO_SUFFIXES)
    ext = p.suffix.lower()
    sub = subtype or _SUBTYPES[ext]
    with atomic_output(p) as tmp:
        with open(tmp, "wb") as fh:
            with sf.SoundFile(fh, "w", samplerate=sr, channels=1, subtype=sub, format=ext[1:].upper()) as out:

                def put(y: np.ndarray) -> None:
                    out.write(to_int16(y) if sub == "PCM_16" else np.clip(y, -1.0, 1.0))

                yield put
            fh.flush()
            os.fsync(fh.fileno())


def _first_line(e: Exception) -> str:
    text = str(e).strip() or type(e).__name__
    return text.splitlines()[0]
