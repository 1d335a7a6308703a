"""One stream's play-out rules (nenv.serve.jitter.PlayOut), packet by packet: no sockets, no sleeps.

References: RFC 3550 appendix A.1 (sequence-number validity: MAX_DROPOUT 3000, MAX_MISORDER 100,
a restart confirmed by two packets in sequence) and RFC 3551 section 4.5.14 (PCMU: one sample
per octet, the timestamp counts samples).
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from nenv.dsp import g711
from nenv.serve.jitter import PlayOut
from nenv.serve.rtp_packet import RtpPacket

N = 160  # samples per 20 ms PCMU packet
ONE_SECOND = 8000  # samples of PCMU's 8000 Hz clock (RFC 3551 section 4.5.14): the longest span filled


def _pkt(seq: int, ts: int, value: float = 0.25) -> RtpPacket:
    payload = g711.encode(np.full(N, value), law="mulaw").tobytes()
    return RtpPacket(payload_type=0, marker=False, seq=seq & 0xFFFF, timestamp=ts & 0xFFFFFFFF, ssrc=1, payload=payload)


def _play(po: PlayOut, packets) -> np.ndarray:
    out = [x for p in packets for x in po.push(p)]
    return np.concatenate(out) if out else np.zeros(0)


def _stream(seq0: int, ts0: int, n: int, values=None):
    return [_pkt(seq0 + i, ts0 + N * i, 0.1 + 0.01 * i if values is None else values[i]) for i in range(n)]


def test_in_order_packets_play_at_once_across_both_wraps():
    pkts = _stream(65534, 2**32 - 2 * N, 6)
    po = PlayOut(pkts[0], window=3)
    y = _play(po, pkts)
    counts = {k: v for k, v in dataclasses.asdict(po.counters).items() if v}
    assert y.size == 6 * N and counts == {"packets": 6, "samples_in": 6 * N}  # every other count 0
    want = np.concatenate([g711.decode(np.frombuffer(p.payload, np.uint8), law="mulaw") for p in pkts])
    np.testing.assert_array_equal(y, want)


def test_a_swap_within_the_window_is_reordered_and_a_late_copy_dropped():
    pkts = _stream(100, 0, 8)
    po = PlayOut(pkts[0], window=3)
    order = [pkts[0], pkts[2], pkts[1], pkts[3], pkts[1], pkts[4], pkts[5], pkts[6], pkts[7]]
    y = _play(po, order)
    c = po.counters
    assert y.size == 8 * N and c.packets == 8 and c.arrived_early == 1 and c.late_or_duplicate == 1 and c.lost_packets == 0
    assert po.push(pkts[3]) == [] and c.late_or_duplicate == 2  # behind the play-out point


def test_a_missing_packet_is_declared_lost_when_the_window_overflows_and_filled_with_its_span():
    pkts = _stream(0, 0, 40)
    po = PlayOut(pkts[0], window=3)
    arrived = [p for i, p in enumerate(pkts) if i != 4]
    y = _play(po, arrived[:7])  # 0..3 played, 5..7 wait (window 3: three may wait)
    assert y.size == 4 * N and len(po.held) == 3 and po.counters.lost_packets == 0
    y2 = _play(po, [pkts[8]])  # a fourth waiting packet: 4 is lost now, not later
    c = po.counters
    assert c.lost_packets == 1 and c.filled_samples == N and y2.size == 5 * N and not po.held
    assert not np.any(y2[:N]) and np.all(y2[N:] != 0)
    # a run of 20 lost packets (400 ms) is filled with exactly its span once the window overflows
    y3 = _play(po, [pkts[9]] + pkts[30:34])
    assert c.lost_packets == 21 and c.filled_samples == 21 * N and y3.size == (1 + 20 + 4) * N
    assert np.all(y3[:N] != 0) and not np.any(y3[N : 21 * N]) and np.all(y3[21 * N :] != 0)


def test_suppressed_silence_is_filled_up_to_a_second_and_a_longer_jump_restarts_timing():
    po = PlayOut(_pkt(0, 0), window=3)
    _play(po, [_pkt(0, 0)])
    y = _play(po, [_pkt(1, N + 2000)])  # the next packet, 2000 samples of silence later
    assert y.size == 2000 + N and not np.any(y[:2000]) and po.counters.silence_filled == 2000
    y = _play(po, [_pkt(2, 2 * N + 2000 + ONE_SECOND + 1)])  # longer than a second: no fill, timing restarts
    assert y.size == N and po.counters.timing_restarts == 1


def test_a_sender_restart_far_ahead_or_behind_is_followed_on_the_second_packet_with_nothing_lost():
    """RFC 3550 A.1: a jump beyond MAX_DROPOUT (or farther back than MAX_MISORDER) is a probable
    restart; the next packet in sequence confirms it. 1000 -> 30000 -> 5000, as a sender that
    restarts twice would send."""
    first, second, third = _stream(1000, 0, 20), _stream(30000, 10**6, 20), _stream(5000, 3 * 10**6, 20)
    po = PlayOut(first[0], window=4)
    y = _play(po, first + second + third)
    c = po.counters
    assert c.resyncs == 2 and c.lost_packets == 0 and c.late_or_duplicate == 0 and c.filled_samples == 0
    assert y.size == 60 * N and c.packets == 60 and c.samples_in == 60 * N


def test_packets_waiting_behind_a_gap_are_played_before_a_sender_restart_is_followed():
    """A restart confirmed while packets wait behind a lost one: the lost one is declared lost and
    its span filled, the waiting ones play, then the new numbering; nothing that arrived is dropped."""
    old = _stream(1000, 0, 10)
    new = _stream(30000, 10**6, 2, values=[0.5, 0.6])
    po = PlayOut(old[0], window=8)
    y = _play(po, [p for i, p in enumerate(old) if i != 3])  # 1003 lost: 1004-1009 wait (six, window 8)
    assert y.size == 3 * N and len(po.held) == 6
    y = np.concatenate([y, _play(po, new)])
    c = po.counters
    assert c.resyncs == 1 and c.lost_packets == 1 and c.filled_samples == N and c.packets == 11
    decoded = [g711.decode(np.frombuffer(p.payload, np.uint8), law="mulaw") for p in old + new]
    want = np.concatenate(decoded[:3] + [np.zeros(N)] + decoded[4:])
    np.testing.assert_array_equal(y, want)


def test_silence_is_padded_only_while_nothing_waits_and_is_taken_off_the_next_jump():
    po = PlayOut(_pkt(0, 0), window=3)
    _play(po, [_pkt(0, 0), _pkt(2, 2 * N)])  # 1 missing: 2 waits
    assert po.pad(80) == [] and po.counters.silence_filled == 0 and po.next_ts == N
    _play(po, [_pkt(1, N)])  # nothing waits now
    pad = po.pad(80)
    assert len(pad) == 1 and np.array_equal(pad[0], np.zeros(80)) and po.counters.silence_filled == 80
    y = _play(po, [_pkt(3, 3 * N + 200)])  # a pause of 200 samples, 80 of them already played
    assert y.size == 120 + N and po.counters.silence_filled == 200 and not np.any(y[:120])


def test_a_single_stray_packet_far_away_is_not_taken_for_a_restart():
    pkts = _stream(200, 0, 10)
    po = PlayOut(pkts[0], window=3)
    y = _play(po, pkts[:5] + [_pkt(40000, 5_000_000)] + pkts[5:])
    c = po.counters
    assert y.size == 10 * N and c.resyncs == 0 and c.lost_packets == 0
    assert po.candidate is not None  # kept only until a successor confirms it: one packet of memory
    _play(po, [_pkt(50000, 7_000_000)])  # another stray replaces it, counted
    assert c.late_or_duplicate == 1


def test_flush_plays_what_waits_and_declares_the_gaps_lost():
    pkts = _stream(0, 0, 6)
    po = PlayOut(pkts[0], window=5)
    _play(po, [pkts[0], pkts[2], pkts[5]])
    y = np.concatenate(po.flush())
    c = po.counters
    assert c.lost_packets == 3 and c.filled_samples == 3 * N and y.size == 5 * N and not po.held  # packet 0 played on arrival


def test_a_copy_of_a_waiting_packet_is_counted_and_played_once():
    pkts = _stream(100, 0, 4)
    po = PlayOut(pkts[0], window=3)
    y = _play(po, [pkts[0], pkts[2], pkts[2], pkts[1], pkts[3]])  # 2 waits for 1; its copy arrives meanwhile
    c = po.counters
    assert c.late_or_duplicate == 1 and c.packets == 4 and c.lost_packets == 0 and y.size == 4 * N


def test_the_sequence_limits_of_rfc_3550_exactly():
    """RFC 3550 appendix A.1 (``update_seq``): ``udelta < MAX_DROPOUT`` is in order (a gap that may
    fill), ``udelta <= RTP_SEQ_MOD - MAX_MISORDER`` a very large jump (a probable restart), anything
    else late or a copy. So 2999 ahead waits as a gap and 3000 ahead is a restart candidate; 99 behind
    is late and 100 behind a restart candidate."""
    from nenv.serve.jitter import MAX_DROPOUT, MAX_MISORDER

    assert (MAX_DROPOUT, MAX_MISORDER) == (3000, 100)  # the RFC's values
    for ahead, waits in ((MAX_DROPOUT - 1, True), (MAX_DROPOUT, False)):
        po = PlayOut(_pkt(1000, 0), window=3)
        _play(po, [_pkt(1000, 0), _pkt(1001 + ahead, N * (1 + ahead))])
        assert (len(po.held) == 1 and po.candidate is None and po.counters.arrived_early == 1) == waits, ahead
        assert (po.candidate is not None and not po.held) == (not waits), ahead
    for behind, late in ((MAX_MISORDER - 1, True), (MAX_MISORDER, False)):
        po = PlayOut(_pkt(1000, 0), window=3)
        _play(po, [_pkt(1000, 0), _pkt(1001 - behind, 0)])  # next expected: 1001
        assert (po.counters.late_or_duplicate == 1 and po.candidate is None) == late, behind
        assert (po.candidate is not None) == (not late), behind


def test_gaps_of_exactly_a_second_are_filled_and_longer_ones_are_not():
    """One second (MAX_FILL) is the longest span filled with silence, for suppressed silence
    (consecutive packets) and for lost packets alike."""
    po = PlayOut(_pkt(0, 0), window=0)
    y = _play(po, [_pkt(0, 0), _pkt(1, N + ONE_SECOND)])  # suppressed silence of exactly a second
    assert y.size == 2 * N + ONE_SECOND and po.counters.silence_filled == ONE_SECOND and po.counters.timing_restarts == 0
    ts = 2 * N + ONE_SECOND
    y = _play(po, [_pkt(3, ts + ONE_SECOND)])  # packet 2 lost: its span and the pause, a second together
    assert po.counters.lost_packets == 1 and po.counters.filled_samples == ONE_SECOND and y.size == ONE_SECOND + N
    ts += ONE_SECOND + N
    y = _play(po, [_pkt(5, ts + ONE_SECOND + 1)])  # packet 4 lost, a span one sample longer: not filled
    assert po.counters.lost_packets == 2 and po.counters.filled_samples == ONE_SECOND and y.size == N
    # and the shortest spans, one sample, are filled too
    ts += ONE_SECOND + 1 + N
    y = _play(po, [_pkt(6, ts + 1)])  # suppressed silence of one sample
    assert y.size == 1 + N and po.counters.silence_filled == ONE_SECOND + 1
    ts += 1 + N
    y = _play(po, [_pkt(8, ts + 1)])  # packet 7 lost, and it held a single sample
    assert po.counters.lost_packets == 3 and po.counters.filled_samples == ONE_SECOND + 1 and y.size == 1 + N


@pytest.mark.parametrize("first", [64999, 1000])
def test_after_a_loss_the_nearest_waiting_packet_plays_first_even_across_the_wrap(first):
    """Distance in sequence numbers is counted modulo 2**16 (RFC 3550 appendix A.1): packet first+1 is
    lost, first+1502 (past the wrap when first is 64999) arrives before first+2; first+2 is the
    nearest and plays first."""
    lost, near, far = ((first + d) & 0xFFFF for d in (1, 2, 1502))
    po = PlayOut(_pkt(first, 0), window=1)
    values = {first: 0.1, near: 0.2, far: 0.3}
    out = _play(po, [_pkt(first, 0, values[first]), _pkt(far, 1502 * N, values[far]), _pkt(near, 2 * N, values[near])])
    c = po.counters
    assert c.lost_packets == 1 and c.filled_samples == N and out.size == 3 * N and list(po.held) == [far]
    decoded = {s: g711.decode(g711.encode(np.full(N, v), law="mulaw"), law="mulaw") for s, v in values.items()}
    np.testing.assert_array_equal(out, np.concatenate([decoded[first], np.zeros(N), decoded[near]]))
    tail = np.concatenate(po.flush())  # 1499 packets lost before the far one; their span (over a second) is not filled
    assert c.lost_packets == 1 + 1499 and np.array_equal(tail, decoded[far]) and lost not in values


def test_an_rtcp_bye_ends_its_stream_at_once_and_the_first_packet_out_carries_the_marker():
    """RFC 3550 section 6.6 (BYE), RFC 5761 section 4 (RTCP on the RTP port, told apart by the second
    octet), RFC 3551 section 4.1 (marker bit on the first packet). Driven through Relay.handle: no
    serving loop, no sleeps."""
    import socket

    from nenv.chain import pipeline
    from nenv.serve import rtp
    from nenv.serve.rtp_packet import build, bye, goodbyes, parse

    rx = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    rx.bind(("127.0.0.1", 0))
    rx.settimeout(2.0)
    relay = rtp.Relay(lambda: pipeline.make_system("imaging"), send_to=rx.getsockname(), idle_timeout_s=60)
    sender = ("127.0.0.1", 40000)
    for i in range(10):
        relay.handle(build(payload_type=0, seq=i, timestamp=N * i, ssrc=0xAB, payload=_pkt(i, 0).payload), sender)
    relay.handle(build(payload_type=0, seq=0, timestamp=0, ssrc=0xCD, payload=_pkt(0, 0).payload), sender)
    receiver_report = bytes([0x80, 201]) + (1).to_bytes(2, "big") + (0xAB).to_bytes(4, "big")  # RR, no report blocks
    goodbye = bytes([0x81, 203, 0, 1]) + (0xAB).to_bytes(4, "big")  # RFC 3550 section 6.6: V=2, SC=1, PT=BYE (203), length 1
    assert bye([0xAB]) == goodbye
    relay.handle(receiver_report + goodbye, ("127.0.0.1", 40001))  # compound RR + BYE, from the RTCP port
    assert 0xAB not in relay.streams and 0xAB in relay.closed and 0xCD in relay.streams  # the other stream goes on
    assert relay.counters.goodbyes == 1 and relay.counters.malformed == 0
    relay.handle(bye([0xCD]), ("127.0.0.2", 40001))  # a BYE from another host does not end a stream
    assert 0xCD in relay.streams and relay.counters.goodbyes == 1
    got = []
    while True:
        try:
            got.append(parse(rx.recv(65535)))
        except socket.timeout:
            break
    ab = [p for p in got if p.payload_type == 96]
    assert sum(len(p.payload) // 2 for p in ab) == 2 * 10 * N  # the whole call, tail included, sent on the BYE
    assert ab[0].marker and not any(p.marker for p in ab[1:])
    assert goodbyes(bye([1, 2])) == [1, 2] and goodbyes(b"\x80\xcb\x00\x05") is None  # a length past the end
    relay.handle(bytes([0x80, 203, 0, 9]), sender)  # malformed RTCP: counted, never raised
    assert relay.counters.malformed == 1
    relay.stop()


@pytest.mark.parametrize("family", ["ipv4", "ipv6"])
def test_the_relay_speaks_ipv6_and_symmetric_rtp(family):
    """IPv6 listen and destination addresses; symmetric RTP sends from the listening port (the
    receiver sees the relay's own RTP address as the source). Driven through Relay.handle."""
    import socket

    from nenv.chain import pipeline
    from nenv.serve import rtp
    from nenv.serve.rtp_packet import build

    host = "::1" if family == "ipv6" else "127.0.0.1"
    if family == "ipv6":
        try:
            socket.socket(socket.AF_INET6, socket.SOCK_DGRAM).bind(("::1", 0))
        except OSError:
            pytest.skip("this machine has no IPv6 loopback")
    rx = socket.socket(socket.AF_INET6 if family == "ipv6" else socket.AF_INET, socket.SOCK_DGRAM)
    rx.bind((host, 0))
    rx.settimeout(2.0)
    relay = rtp.Relay(lambda: pipeline.make_system("imaging"), listen=(host, 0), send_to=rx.getsockname()[:2], symmetric=True, idle_timeout_s=60)
    for i in range(4):
        relay.handle(build(payload_type=8, seq=i, timestamp=N * i, ssrc=5, payload=b"\xd5" * N), (host, 40000, 0, 0)[: 4 if family == "ipv6" else 2])
    data, source = rx.recvfrom(65535)
    assert source[:2] == relay.address[:2]  # symmetric: from the port the relay listens on
    relay.stop()
    with pytest.raises(Exception, match="one family"):
        rtp.Relay(lambda: pipeline.make_system("imaging"), listen=("127.0.0.1", 0), send_to=("::1", 9), symmetric=True)


def test_a_quiet_stream_sends_its_tail_at_once_and_keeps_its_timing():
    """After TAIL_AFTER_S without packets the audio the engine holds back goes out (the end of a call
    no longer waits for the idle timeout); when the sender resumes after its pause, the silence
    already played is taken off the pause, so the output stays as long as the call's timestamps say."""
    import socket

    from nenv.chain import pipeline
    from nenv.serve import rtp
    from nenv.serve.rtp_packet import build, parse

    rx = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    rx.bind(("127.0.0.1", 0))
    rx.settimeout(1.0)
    relay = rtp.Relay(lambda: pipeline.make_system("imaging"), send_to=rx.getsockname(), idle_timeout_s=60)
    sender = ("127.0.0.1", 40000)
    for i in range(5):  # 100 ms of speech
        relay.handle(build(payload_type=0, seq=i, timestamp=N * i, ssrc=3, payload=_pkt(i, 0).payload), sender)

    def received() -> int:
        n = 0
        while True:
            try:
                n += len(parse(rx.recv(65535)).payload) // 2
            except socket.timeout:
                return n

    before = received()
    assert before < 2 * 5 * N  # part of the call is still held back in the engine and the packetiser
    relay.streams[3].last_seen -= rtp.TAIL_AFTER_S + 0.01  # the sender went quiet
    relay._expire()
    assert before + received() >= 2 * 5 * N  # every sample of the call is out, long before the idle timeout
    # the sender resumes after a 1 s pause (silence suppression): the pause is filled, minus what was played
    relay.handle(build(payload_type=0, seq=5, timestamp=N * 5 + 8000, ssrc=3, payload=_pkt(5, 0).payload), sender)
    relay._close(3)
    c = relay.closed[3]
    assert c.silence_filled == 8000 and c.samples_in == 6 * N
    relay.stop()
