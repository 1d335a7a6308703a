"""nenv relay and nenv stream against independently written media tools: GStreamer, ffmpeg and SoX.

The tools come from Debian (`.ci/run` installs gstreamer1.0-tools, -plugins-base, -plugins-good, ffmpeg
and sox and sets NENV_INTEROP=required, so that a missing tool fails these tests with the reason
instead of skipping them). Elsewhere they skip when a tool is missing.

Each test sends a real clip's G.711 bytes, made by nenv and written into a WAV or raw file, so the
tools only packetise, pace, depacketise and pipe: the audio that comes back must equal offline
`nenv extend` of the same bytes, to 1 LSB, at its exact length.
"""

from __future__ import annotations

import shutil
import signal
import socket
import struct
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from nenv.chain import pipeline
from nenv.dsp import channel, g711
from nenv.media.audio import to_int16
from nenv.serve import rtp, rtp_packet
from tests.conftest import missing_tool

WAV_FORMAT_TAG = {"mulaw": 7, "alaw": 6}  # WAVE_FORMAT_MULAW / WAVE_FORMAT_ALAW (Microsoft RIFF specification)
PAYLOAD_TYPE = {"mulaw": 0, "alaw": 8}  # RFC 3551 table 4: PCMU, PCMA
L16_CAPS = "application/x-rtp,media=audio,clock-rate=16000,encoding-name=L16,channels=1,payload=96"


def _tool(name: str) -> str:
    path = shutil.which(name)
    if path is None:
        missing_tool(f"{name} is not installed (Debian: .ci/run installs it)")
    return path


def _free_port() -> int:
    s = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    s.bind(("127.0.0.1", 0))
    port = s.getsockname()[1]
    s.close()
    return port


def _clip(arctic_refs, law: str, seconds: float = 2.0) -> tuple[np.ndarray, np.ndarray]:
    """A real clip through the telephone channel: its G.711 bytes and what they decode to."""
    _, ref = arctic_refs[0]
    x = channel.telephone(ref, sr=16000, law=law)[: int(8000 * seconds)]
    codes = g711.encode(x, law=law).astype(np.uint8)
    return codes, g711.decode(codes, law=law)


def _g711_wav(path: Path, codes: np.ndarray, law: str) -> Path:
    fmt = struct.pack("<HHIIHH", WAV_FORMAT_TAG[law], 1, 8000, 8000, 1, 8)
    body = b"WAVE" + b"fmt " + struct.pack("<I", len(fmt)) + fmt + b"data" + struct.pack("<I", codes.size) + codes.tobytes()
    path.write_bytes(b"RIFF" + struct.pack("<I", len(body)) + body)
    return path


def _expected(decoded: np.ndarray, method: str) -> np.ndarray:
    return to_int16(pipeline.extend(decoded, system=pipeline.make_system(method)).y).astype(np.int64)


def _stop(p: subprocess.Popen, timeout: float = 20.0) -> None:
    """Ask a tool to finish (SIGINT: GStreamer with -e sends EOS, ffmpeg closes its output) and wait."""
    if p.poll() is None:
        p.send_signal(signal.SIGINT)
    try:
        p.wait(timeout=timeout)
    except subprocess.TimeoutExpired:
        p.kill()
        p.wait()


def _gst_receiver(port: int, out: Path) -> subprocess.Popen:
    """GStreamer's own RTP receiver for the relay's output: jitter buffer, L16 depayloader, raw S16BE file."""
    p = subprocess.Popen([_tool("gst-launch-1.0"), "-e", "-q", "udpsrc", "address=127.0.0.1", f"port={port}", f"caps={L16_CAPS}", "!",
                          "rtpjitterbuffer", "latency=200", "!", "rtpL16depay", "!", "filesink", f"location={out}"], stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    _wait_bound(p, port, at_least=1.0)  # and until the pipeline is playing
    return p


def _ffmpeg_receiver(port: int, tmp: Path, out: Path) -> subprocess.Popen:
    """ffmpeg's RTP receiver for the relay's output, through an SDP file (RFC 4566) naming L16 at 16 kHz."""
    sdp = tmp / "relay.sdp"
    sdp.write_text(f"v=0\no=- 0 0 IN IP4 127.0.0.1\ns=nenv relay\nc=IN IP4 127.0.0.1\nt=0 0\nm=audio {port} RTP/AVP 96\na=rtpmap:96 L16/16000/1\n")
    p = subprocess.Popen([_tool("ffmpeg"), "-hide_banner", "-loglevel", "error", "-nostdin", "-protocol_whitelist", "file,udp,rtp", "-i", str(sdp),
                          "-c:a", "pcm_s16be", "-f", "s16be", "-y", str(out)], stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    _wait_bound(p, port, at_least=1.5)
    return p


def _wait_bound(p: subprocess.Popen, port: int, *, at_least: float, seconds: float = 20.0) -> None:
    """Wait ``at_least`` seconds (the tool's start-up), and on until the receiver has bound its UDP
    ``port`` (Linux lists bound sockets in /proc/net/udp, the port in hex after the address): on a
    busy machine the pause alone could end before anyone listened. Elsewhere, the pause alone."""
    from nenv.serve import udp

    t0 = time.monotonic()
    time.sleep(at_least)
    if udp.sockets() is None:
        return
    want = f":{port:04X}"
    while time.monotonic() - t0 < seconds:
        if any(cols[1].endswith(want) for cols in udp.sockets()):
            return
        assert p.poll() is None, f"the receiver exited before listening: {p.stderr.read().decode(errors='replace')[-500:]}"
        time.sleep(0.05)
    raise AssertionError(f"no receiver bound UDP port {port} within {seconds} s")


def _gst_sender(wav: Path, port: int, law: str, *, ssrc: int = 0x4E454E56, seq: int = 1000, rtcp: bool = False) -> list[str]:
    pay = {"mulaw": "rtppcmupay", "alaw": "rtppcmapay"}[law]
    head = [_tool("gst-launch-1.0"), "-q", "filesrc", f"location={wav}", "!", "wavparse", "!", pay, "min-ptime=20000000", "max-ptime=20000000", f"ssrc={ssrc}", f"seqnum-offset={seq}", "!"]
    if not rtcp:
        return head + ["udpsink", "host=127.0.0.1", f"port={port}"]
    # through rtpbin, which also sends RTCP (to the port above) and a BYE when the stream ends
    return head + ["rtpbin.send_rtp_sink_0", "rtpbin", "name=rtpbin", "rtpbin.send_rtp_src_0", "!", "udpsink", "host=127.0.0.1", f"port={port}",
                   "rtpbin.send_rtcp_src_0", "!", "udpsink", "host=127.0.0.1", f"port={port + 1}", "sync=false", "async=false"]


def _read_l16(path: Path) -> np.ndarray:
    return np.frombuffer(path.read_bytes(), dtype=">i2").astype(np.int64)


def _wait_closed(relay, ssrc: int, seconds: float) -> float:
    t0 = time.monotonic()
    while ssrc not in relay.closed and time.monotonic() - t0 < seconds:
        time.sleep(0.02)
    assert ssrc in relay.closed, f"stream {ssrc:08x} was not closed within {seconds} s"
    return time.monotonic() - t0


def _free_pair() -> int:
    """A port P with P + 1 free too (RTP and RTCP)."""
    for _ in range(50):
        p = _free_port()
        try:
            s = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
            s.bind(("127.0.0.1", p + 1))
            s.close()
            return p
        except OSError:
            continue
    raise RuntimeError("no free port pair")


@pytest.mark.parametrize("law", ["mulaw", "alaw"])
def test_gstreamer_sends_and_receives_through_the_relay(arctic_refs, tmp_path, law):
    """GStreamer packetises the clip (20 ms PCMU/PCMA), the relay extends it, GStreamer depacketises the
    L16 behind its jitter buffer: the audio equals offline extend of the same bytes."""
    codes, decoded = _clip(arctic_refs, law)
    wav = _g711_wav(tmp_path / "call.wav", codes, law)
    rx_port = _free_port()
    out = tmp_path / "out.raw"
    receiver = _gst_receiver(rx_port, out)
    listen = _free_pair()
    relay = rtp.Relay(lambda: pipeline.make_system("imaging"), listen=("127.0.0.1", listen), send_to=("127.0.0.1", rx_port), idle_timeout_s=2.0).start()
    try:
        sender = subprocess.run(_gst_sender(wav, listen, law), capture_output=True, timeout=60)
        assert sender.returncode == 0, sender.stderr.decode()
        _wait_closed(relay, 0x4E454E56, 5.0)
        time.sleep(0.5)
    finally:
        relay.stop()
        _stop(receiver)
    y = _read_l16(out)
    expected = _expected(decoded, "imaging")
    c = relay.closed[0x4E454E56]
    assert c.packets == codes.size // 160 and c.lost_packets == 0
    # the stream went quiet at its end: the relay pushed its tail out with TAIL_SAMPLES of silence
    assert y.size == expected.size + 2 * rtp.TAIL_SAMPLES
    assert np.max(np.abs(y[: expected.size] - expected)) <= 1


def test_ffmpeg_sends_pcma_and_receives_through_the_batched_relay(arctic_refs, tmp_path):
    """ffmpeg paces and packetises the A-law clip (40 ms packets of its own choosing; it sends no BYE), the
    relay runs the neural method with all streams batched, ffmpeg receives the L16 through an SDP file."""
    law = "alaw"
    codes, decoded = _clip(arctic_refs, law)
    raw = tmp_path / "call.alaw"
    raw.write_bytes(codes.tobytes())
    rx_port = _free_pair()
    out = tmp_path / "out.raw"
    receiver = _ffmpeg_receiver(rx_port, tmp_path, out)
    listen = _free_pair()
    model = pipeline.load_model(None)
    relay = rtp.Relay(lambda: pipeline.make_system("neural", model=model), listen=("127.0.0.1", listen), send_to=("127.0.0.1", rx_port), idle_timeout_s=2.0, batch_model=model).start()
    try:
        sender = subprocess.run([_tool("ffmpeg"), "-hide_banner", "-loglevel", "error", "-nostdin", "-re", "-f", "alaw", "-ar", "8000", "-ac", "1", "-i", str(raw),
                                 "-c:a", "copy", "-f", "rtp", "-payload_type", "8", f"rtp://127.0.0.1:{listen}"], capture_output=True, timeout=60)
        assert sender.returncode == 0, sender.stderr.decode()
        t0 = time.monotonic()
        while not relay.closed and time.monotonic() - t0 < 6:
            time.sleep(0.02)
        time.sleep(1.0)
    finally:
        relay.stop()
        _stop(receiver)
    assert len(relay.closed) == 1, "the stream did not end"
    (c,) = relay.closed.values()
    assert c.lost_packets == 0 and c.packets * 320 == codes.size
    y = _read_l16(out)
    expected = _expected(decoded, "neural")
    assert y.size == expected.size + 2 * rtp.TAIL_SAMPLES
    assert np.max(np.abs(y[: expected.size] - expected)) <= 1


def _imaging_relay(*, idle_timeout_s: float):
    """An imaging relay on a free RTP/RTCP port pair, sending to a socket nobody reads (its output is not checked here)."""
    rx = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    rx.bind(("127.0.0.1", 0))
    listen = _free_pair()
    relay = rtp.Relay(lambda: pipeline.make_system("imaging"), listen=("127.0.0.1", listen), send_to=rx.getsockname(), idle_timeout_s=idle_timeout_s).start()
    return relay, listen, rx  # the caller keeps rx open while the relay runs


def test_gstreamer_rtcp_bye_ends_the_call_at_once(arctic_refs, tmp_path):
    """GStreamer's rtpbin sends RTCP to the port above the RTP port and a BYE at the end of the stream: the
    relay closes the call on it (RFC 3550 section 6.6), well before its idle timeout."""
    codes, _ = _clip(arctic_refs, "mulaw", seconds=1.0)
    wav = _g711_wav(tmp_path / "call.wav", codes, "mulaw")
    relay, listen, _rx = _imaging_relay(idle_timeout_s=10.0)
    sender = subprocess.Popen(_gst_sender(wav, listen, "mulaw", rtcp=True), stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    try:
        waited = _wait_closed(relay, 0x4E454E56, 8.0)
    finally:
        sender.kill()
        sender.wait()
        relay.stop()
    assert relay.counters.goodbyes >= 1
    assert waited < 1.0 + codes.size / 8000  # the clip's own length plus well under the 10 s idle timeout
    assert relay.closed[0x4E454E56].packets == codes.size // 160


def test_three_gstreamer_senders_in_turn_on_one_ssrc_lose_nothing(arctic_refs, tmp_path):
    """Three senders one after another with the same SSRC and sequence numbers jumping 1000 -> 30000 -> 5000
    (restarts per RFC 3550 appendix A.1): every packet is delivered and none is counted lost."""
    codes, _ = _clip(arctic_refs, "mulaw", seconds=1.0)
    wav = _g711_wav(tmp_path / "call.wav", codes, "mulaw")
    relay, listen, _rx = _imaging_relay(idle_timeout_s=3.0)
    try:
        for seq in (1000, 30000, 5000):
            sender = subprocess.run(_gst_sender(wav, listen, "mulaw", seq=seq), capture_output=True, timeout=60)
            assert sender.returncode == 0, sender.stderr.decode()
        _wait_closed(relay, 0x4E454E56, 8.0)
    finally:
        relay.stop()
    c = relay.closed[0x4E454E56]
    assert c.resyncs == 2 and c.source_changes == 2  # each gst-launch sends from a new port, with new numbering
    # a new address for a busy SSRC is held for REBIND_AFTER_S (0.1 s) after the old one's last packet (a
    # possible collision or loop, RFC 3550 section 8.2), then followed: every packet is played
    assert c.packets == 3 * (codes.size // 160) and c.lost_packets == 0 and relay.counters.ssrc_conflicts == 0


@pytest.mark.parametrize("tool", ["sox", "ffmpeg"])
def test_stream_takes_g711_piped_from_sox_and_ffmpeg(arctic_refs, tmp_path, tool):
    """SoX or ffmpeg turns a 16-bit WAV into raw mu-law on a pipe into `nenv stream`; the result equals
    offline extend of the same bytes (which the same tool writes to a file as well)."""
    import soundfile as sf

    _, ref = arctic_refs[0]
    x = channel.telephone(ref, sr=16000, law="none")[:16000]
    wav = tmp_path / "call.wav"
    sf.write(wav, x, 8000, subtype="PCM_16")
    if tool == "sox":  # -D: no dither (SoX dithers by default when it reduces the bit depth, differently every run)
        convert = [_tool("sox"), "-q", "-D", str(wav), "-t", "raw", "-e", "mu-law", "-b", "8", "-r", "8000", "-c", "1"]
    else:
        convert = [_tool("ffmpeg"), "-hide_banner", "-loglevel", "error", "-nostdin", "-i", str(wav), "-c:a", "pcm_mulaw", "-f", "mulaw"]
    subprocess.run(convert + [str(tmp_path / "copy.ulaw")], check=True, timeout=60)
    out = tmp_path / "out.raw"
    with open(out, "wb") as fh:
        conv = subprocess.Popen(convert + ["-"], stdout=subprocess.PIPE)
        nenv = subprocess.run([sys.executable, "-m", "nenv", "stream", "--input-format", "mulaw", "--method", "imaging"], stdin=conv.stdout, stdout=fh, stderr=subprocess.PIPE, timeout=120)
        conv.stdout.close()
        assert conv.wait(timeout=30) == 0
    assert nenv.returncode == 0, nenv.stderr.decode()
    codes = np.fromfile(tmp_path / "copy.ulaw", dtype=np.uint8)
    assert codes.size == x.size
    y = np.frombuffer(out.read_bytes(), dtype="<i2").astype(np.int64)
    expected = _expected(g711.decode(codes, law="mulaw"), "imaging")
    assert y.size == expected.size
    assert np.max(np.abs(y - expected)) <= 1


def test_relay_command_stops_cleanly_on_two_signals_while_gstreamer_sends(arctic_refs, tmp_path):
    """`nenv relay` receiving from GStreamer gets two SIGTERMs a few ms apart (as `timeout` and supervisors
    send them): it exits 0 with its summary, and the packets it sent are numbered without a gap or repeat."""
    codes, _ = _clip(arctic_refs, "mulaw")
    wav = _g711_wav(tmp_path / "call.wav", codes, "mulaw")
    rx = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    rx.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, 4 * 2**20)
    rx.bind(("127.0.0.1", 0))
    rx.settimeout(0.2)
    listen = _free_pair()
    p = subprocess.Popen([sys.executable, "-m", "nenv", "relay", "--to", f"127.0.0.1:{rx.getsockname()[1]}", "--listen", f"127.0.0.1:{listen}", "--method", "imaging"],
                         stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    import select

    assert select.select([p.stderr], [], [], 120)[0], "relay did not start"
    assert b"relaying RTP" in p.stderr.readline()
    sender = subprocess.Popen(_gst_sender(wav, listen, "mulaw"), stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    got = []
    t0 = time.monotonic()
    while time.monotonic() - t0 < 1.0:  # mid-call
        try:
            got.append(rx.recv(65535))
        except socket.timeout:
            pass
    p.send_signal(signal.SIGTERM)
    time.sleep(0.003)
    p.send_signal(signal.SIGTERM)
    _, err = p.communicate(timeout=30)
    sender.kill()
    sender.wait()
    while True:
        try:
            got.append(rx.recv(65535))
        except socket.timeout:
            break
    assert p.returncode == 0, err.decode()
    assert b"packets in" in err or b"packet in" in err
    seqs = [rtp_packet.parse(g).seq for g in got]
    assert len(seqs) > 10 and all((b - a) & 0xFFFF == 1 for a, b in zip(seqs[:-1], seqs[1:]))
