"""The relay's stream rules on a clock the test holds: no serving loop, no sleeps.

Each test builds a :class:`nenv.serve.rtp.Relay`, replaces its clock by :class:`Clock` and its output
socket by :class:`Sink`, and drives ``handle`` and ``_expire`` by hand, so every rule that depends on
time (RFC 3550 section 8.2's second sender, the held-back tail, the idle timeout) is checked at its
edges. Times are multiples of 1/8 s, exact in binary floating point, so an edge is an edge.
"""

from __future__ import annotations

import numpy as np
import pytest

from nenv.chain import pipeline
from nenv.dsp import g711
from nenv.media.audio import to_int16
from nenv.serve import rtp
from nenv.serve.rtp_packet import build, bye, parse

N = 160  # 8 kHz samples per 20 ms packet
A, B, C = ("10.0.0.1", 4000), ("10.0.0.2", 4000), ("10.0.0.3", 4000)


class Clock:
    """The relay's time, moved by the test."""

    def __init__(self, t: float = 1000.0):
        self.t = t

    def __call__(self) -> float:
        return self.t


class Sink:
    """An output socket that keeps every packet the relay sends (parsed)."""

    def __init__(self):
        self.sent = []

    def sendto(self, data: bytes, address) -> None:
        self.sent.append(parse(data))

    def close(self) -> None:
        pass

    def samples(self, ssrc: int | None = None) -> np.ndarray:
        """The L16 samples sent (of one output SSRC), in the order sent."""
        parts = [np.frombuffer(p.payload, dtype=">i2") for p in self.sent if ssrc is None or p.ssrc == ssrc]
        return np.concatenate(parts).astype(np.int64) if parts else np.zeros(0, dtype=np.int64)


@pytest.fixture
def relay():
    r = rtp.Relay(lambda: pipeline.make_system("imaging"), send_to=("127.0.0.1", 9), idle_timeout_s=1.0)
    r.out.close()
    r.out, r.clock = Sink(), Clock()
    yield r
    r.stop()


def _packet(seq: int, *, ssrc: int = 1, payload: bytes = b"\x10" * N, pt: int = 0, ts: int | None = None) -> bytes:
    return build(payload_type=pt, seq=seq, timestamp=N * seq if ts is None else ts, ssrc=ssrc, payload=payload)


def test_a_second_address_is_held_while_the_source_may_still_be_sending_and_followed_once_it_has_been_quiet(relay, monkeypatch):
    """RFC 3550 section 8.2: an SSRC from a second transport address is a collision or a loop while its
    own sender is alive; after REBIND_AFTER_S of the sender's silence, the SSRC follows the new address."""
    monkeypatch.setattr(rtp, "REBIND_AFTER_S", 0.25)
    relay.handle(_packet(0), A)
    st = relay.streams[1]
    relay.clock.t += 0.125
    relay.handle(_packet(1, payload=b"\x90" * N), B)  # half the quiet time: held
    assert st.source == A and st.newcomer == B and len(st.newcomer_packets) == 1 and st.counters.packets == 1
    relay.handle(_packet(1), A)  # the source speaks again: the held packet was a collision
    assert relay.counters.ssrc_conflicts == 1 and st.newcomer == () and st.newcomer_packets == [] and st.counters.packets == 2
    relay.clock.t += 0.25 - 0.125 / 8
    relay.handle(_packet(2, payload=b"\x90" * N), B)  # just short of the quiet time: still held
    assert st.source == A and len(st.newcomer_packets) == 1
    relay.clock.t += 0.125 / 8  # exactly REBIND_AFTER_S since the source's last packet: followed, the held packet first
    relay.handle(_packet(3, payload=b"\x90" * N), B)
    assert st.source == B and st.counters.source_changes == 1 and st.counters.packets == 4 and st.newcomer == ()
    assert st.last_seen == relay.clock.t and relay.counters.ssrc_conflicts == 1 and st.counters.lost_packets == 0
    relay._close(1)  # played: the source's two packets, then the held packet and the one that followed it
    played = g711.decode(np.frombuffer(b"\x10" * 2 * N + b"\x90" * 2 * N, dtype=np.uint8), law="mulaw")
    assert np.array_equal(relay.out.samples(), to_int16(pipeline.extend(played, system=pipeline.make_system("imaging")).y))


def test_two_senders_with_one_ssrc_never_mix_and_a_moved_sender_is_followed(relay, monkeypatch):
    """Two devices sending SSRC 1 at once (fixed SSRCs are common in simple devices): the second one's
    packets are held until the first speaks again, then dropped; nothing of them is played."""
    monkeypatch.setattr(rtp, "REBIND_AFTER_S", 0.25)
    loud, other = b"\x10" * N, b"\x90" * N  # two different G.711 mu-law payloads
    for seq in range(5):
        relay.handle(_packet(seq, payload=loud), A)
        relay.handle(_packet(100 + seq, ts=999 + N * seq, payload=other), B)
        relay.clock.t += 0.02
    st = relay.streams[1]
    # four dropped so far, the last one still held (the first sender's next packet, or its silence, decides)
    assert relay.counters.ssrc_conflicts == 4 and st.newcomer == B and len(st.newcomer_packets) == 1
    assert st.source == A and st.counters.packets == 5 and st.counters.samples_in == 5 * N and st.counters.late_or_duplicate == 0
    relay.clock.t += 0.25  # the first sender goes quiet; its packets then come from a new port (NAT rebinding)
    moved = ("10.0.0.1", 4002)
    relay.handle(_packet(5, payload=loud), moved)
    assert st.source == moved and st.counters.source_changes == 1 and st.counters.packets == 6
    assert relay.counters.ssrc_conflicts == 5  # B's held packet went when the stream moved elsewhere
    relay.handle(_packet(6, payload=loud), A)  # the old port, right away: held ...
    relay.handle(_packet(6, payload=loud), moved)  # ... and dropped: the source is alive
    assert relay.counters.ssrc_conflicts == 6 and st.counters.packets == 7 and st.source == moved
    relay._close(1)  # what was played is the first sender's call alone, extended
    played = g711.decode(np.frombuffer(loud * 7, dtype=np.uint8), law="mulaw")
    assert np.array_equal(relay.out.samples(), to_int16(pipeline.extend(played, system=pipeline.make_system("imaging")).y))


def test_the_quiet_time_is_counted_up_to_heard_not_to_the_relays_clock(relay, monkeypatch):
    """A packet handled late (it waited in the socket while the relay was busy) arrived after ``heard``:
    the source's silence before it is known only up to then."""
    monkeypatch.setattr(rtp, "REBIND_AFTER_S", 0.25)
    relay.handle(_packet(0), A)
    st = relay.streams[1]
    relay.clock.t += 2.0  # the relay was busy for 2 s ...
    relay.handle(_packet(1, payload=b"\x90" * N), B, heard=st.last_seen + 0.125)  # ... but this packet may have come 125 ms after A's
    assert st.source == A and st.newcomer == B
    relay.handle(_packet(2, payload=b"\x90" * N), B, heard=st.last_seen + 0.25)
    assert st.source == B and st.counters.packets == 3
    relay.clock.t += 0.5  # quiet by the clock, not by what was heard: nothing happens
    relay._expire(heard=st.last_seen + 0.125)
    assert not st.tail_sent and 1 in relay.streams


def test_a_newcomer_followed_while_all_is_quiet_gets_its_own_tail(relay, monkeypatch):
    """A held newcomer followed by ``_expire`` (the source stayed quiet for REBIND_AFTER_S) starts a
    stream of its own: when it has been quiet for TAIL_AFTER_S in turn, the audio of its held packets
    that the engine still holds is pushed out as its tail."""
    monkeypatch.setattr(rtp, "REBIND_AFTER_S", 0.25)
    monkeypatch.setattr(rtp, "TAIL_AFTER_S", 0.25)
    relay.handle(_packet(0), A)
    st = relay.streams[1]
    relay.clock.t += 0.125
    relay.handle(_packet(1, payload=b"\x90" * N), B)  # held: A may still be sending
    relay.clock.t += 0.125
    relay._expire()  # A quiet for REBIND_AFTER_S: B followed, its held packet played
    assert st.source == B and not st.tail_sent
    before = len(relay.out.sent)
    relay.clock.t += 0.375
    relay._expire()
    assert st.tail_sent and st.counters.silence_filled == rtp.TAIL_SAMPLES and len(relay.out.sent) > before


def test_a_third_address_replaces_the_held_one_and_the_held_packets_are_bounded(relay, monkeypatch):
    monkeypatch.setattr(rtp, "REBIND_AFTER_S", 0.25)
    relay.handle(_packet(0), A)
    st = relay.streams[1]
    for seq in range(1, 4):
        relay.handle(_packet(seq, payload=b"\x90" * N), B)
    relay.handle(_packet(4, payload=b"\xa0" * N), C)  # B's three held packets go
    assert st.newcomer == C and len(st.newcomer_packets) == 1 and relay.counters.ssrc_conflicts == 3
    for seq in range(5, 5 + 2 * rtp.MAX_NEWCOMER_PACKETS):  # a flood from C: the oldest held ones go
        relay.handle(_packet(seq, payload=b"\xa0" * N), C)
        assert len(st.newcomer_packets) <= rtp.MAX_NEWCOMER_PACKETS
    assert len(st.newcomer_packets) == rtp.MAX_NEWCOMER_PACKETS and relay.counters.ssrc_conflicts == 3 + 1 + rtp.MAX_NEWCOMER_PACKETS
    assert [p.seq for p in st.newcomer_packets] == list(range(5 + rtp.MAX_NEWCOMER_PACKETS, 5 + 2 * rtp.MAX_NEWCOMER_PACKETS))
    assert st.source == A and st.counters.packets == 1  # nothing of the others was played
    relay.clock.t += 0.25
    relay.handle(_packet(0, payload=b"\x90" * N), B)  # B again after the source's silence: C's held packets go, B is followed
    assert st.source == B and relay.counters.ssrc_conflicts == 3 + 1 + 2 * rtp.MAX_NEWCOMER_PACKETS and st.counters.source_changes == 1


def test_a_sender_that_restarts_on_a_new_port_at_once_loses_nothing(relay, monkeypatch):
    """A sender restarting on a new port (new numbering) within REBIND_AFTER_S of its last packet: its first
    packets are held, not dropped, and played in order once the old port has stayed quiet, by its next
    packet or, when it sends no more, by the relay's clock (``_expire``)."""
    monkeypatch.setattr(rtp, "REBIND_AFTER_S", 0.25)
    old, new = ("10.0.0.1", 4000), ("10.0.0.1", 4010)
    for seq in range(5):
        relay.handle(_packet(1000 + seq, ssrc=7, ts=N * seq), old)
    st = relay.streams[7]
    for seq in range(3):
        relay.handle(_packet(30000 + seq, ssrc=7, ts=5000 + N * seq, payload=b"\x20" * N), new)
    assert st.source == old and len(st.newcomer_packets) == 3 and st.counters.packets == 5
    relay.clock.t += 0.25
    relay.handle(_packet(30003, ssrc=7, ts=5000 + 3 * N, payload=b"\x20" * N), new)
    assert st.source == new and st.counters.packets == 9 and st.counters.resyncs == 1 and st.counters.lost_packets == 0
    assert relay.counters.ssrc_conflicts == 0 and st.counters.samples_in == 9 * N
    for seq in range(2):  # back to the old port at once: held
        relay.handle(_packet(100 + seq, ssrc=7, ts=90000 + N * seq, payload=b"\x30" * N), old)
    assert st.source == new and len(st.newcomer_packets) == 2
    relay.clock.t += 0.25 - 0.125 / 8
    relay._expire()
    assert st.source == new  # not yet quiet long enough
    relay.clock.t += 0.125 / 8
    relay._expire()
    assert st.source == old and st.counters.source_changes == 2 and st.counters.packets == 11 and relay.counters.ssrc_conflicts == 0


def test_a_quiet_stream_sends_its_tail_once_and_an_idle_one_is_closed_at_its_timeout(relay, monkeypatch):
    """TAIL_AFTER_S of silence pushes out the held-back audio (once per quiet spell, a last shorter packet
    included); more than ``idle_timeout_s`` closes the stream and keeps its counters."""
    monkeypatch.setattr(rtp, "TAIL_AFTER_S", 0.25)
    for seq in range(5):
        relay.handle(_packet(seq, payload=bytes(range(seq, seq + N))), A)
    st = relay.streams[1]
    before = len(relay.out.sent)
    relay.clock.t += 0.25
    relay._expire()  # exactly TAIL_AFTER_S: not yet
    assert not st.tail_sent and len(relay.out.sent) == before
    relay.clock.t += 0.125
    relay._expire()
    assert st.tail_sent and st.counters.silence_filled == rtp.TAIL_SAMPLES
    tail = relay.out.sent[before:]
    # all of the call is out, and the silence that pushed it, less the interpolator's delay it now holds
    assert sum(len(p.payload) // 2 for p in relay.out.sent) == 2 * (5 * N + rtp.TAIL_SAMPLES) - pipeline.LATENCY > 2 * 5 * N
    assert len(tail[-1].payload) // 2 < rtp.OUT_SAMPLES and st.out.pending == b""  # the last, shorter packet went too
    assert st.counters.packets_out == len(relay.out.sent)
    relay.clock.t += 0.125
    relay._expire()  # the same quiet spell: nothing more
    assert len(relay.out.sent) == before + len(tail)
    relay.handle(_packet(5), A)  # the sender resumes: a new quiet spell may send a tail again
    assert not st.tail_sent
    relay.clock.t += 1.0
    relay._expire()  # exactly the idle timeout: open (its tail sent)
    assert 1 in relay.streams and st.tail_sent
    relay.clock.t += 0.125
    relay._expire()
    assert 1 not in relay.streams and relay.closed[1] is st.counters and relay.counters.streams_closed == 1
    assert st.counters.packets == 6


def test_what_the_relay_refuses_is_counted_and_opens_no_stream(relay):
    relay.allowed = {"10.0.0.1"}
    relay.handle(_packet(0), B)
    assert relay.counters.not_allowed == 1 and not relay.streams
    relay.handle(b"\x80\x00junk", A)  # too short for an RTP header
    relay.handle(_packet(0, pt=18), A)  # G.729 (RFC 3551): not G.711
    relay.handle(_packet(0, payload=b"\xff" * (rtp.MAX_PAYLOAD + 1)), A)
    relay.handle(bytes([0x80, 203, 0, 9]), A)  # a BYE whose length runs past the end
    c = relay.counters
    assert (c.malformed, c.wrong_payload_type, c.oversized, c.streams_opened) == (2, 1, 1, 0)
    relay.handle(_packet(0, payload=b"\xff" * rtp.MAX_PAYLOAD), A)  # 200 ms of G.711: the longest taken
    relay.handle(_packet(0, ssrc=2, pt=8, payload=b"\xd5" * N), A)  # PCMA
    assert c.streams_opened == 2 and relay.streams[1].law == "mulaw" and relay.streams[2].law == "alaw"


def test_the_stream_limit_refuses_new_ssrcs_until_one_ends(relay):
    relay.max_streams = 3
    for ssrc in range(1, 6):
        relay.handle(_packet(0, ssrc=ssrc), A)
    assert sorted(relay.streams) == [1, 2, 3] and relay.counters.over_stream_limit == 2
    relay.handle(_packet(1, ssrc=2), A)  # a stream already open is not refused
    assert relay.streams[2].counters.packets == 2 and relay.counters.over_stream_limit == 2
    relay.handle(bye([2]), ("10.0.0.1", 4001))  # RFC 3550 section 6.6, from the sender's RTCP port
    relay.handle(_packet(0, ssrc=4), A)
    assert sorted(relay.streams) == [1, 3, 4] and relay.counters.goodbyes == 1 and relay.counters.over_stream_limit == 2


def test_closed_streams_keep_their_counters_up_to_max_closed(relay, monkeypatch):
    monkeypatch.setattr(rtp, "MAX_CLOSED", 3)
    for ssrc in range(10, 16):
        relay.handle(_packet(0, ssrc=ssrc), A)
    relay.clock.t += 2.0
    relay._expire()
    assert not relay.streams and list(relay.closed) == [13, 14, 15] and relay.counters.streams_closed == 6


def test_what_a_stream_sends_is_its_g711_audio_extended_offline(relay, arctic_refs):
    """Packets in order, the output's packet numbers and timestamps consecutive: the samples sent are
    offline extension of the decoded call, with the tail's silence after it."""
    from nenv.dsp import channel

    _, ref = arctic_refs[0]
    codes = g711.encode(channel.telephone(ref, sr=16000, law="alaw")[:8000], law="alaw")
    for i in range(codes.size // N):
        relay.handle(_packet(i, pt=8, payload=codes[i * N : (i + 1) * N].tobytes()), A)
        relay.clock.t += 0.02
    relay.clock.t += 0.375
    relay._expire()  # quiet: the tail goes out, pushed by TAIL_SAMPLES of silence
    relay.clock.t += 1.0
    relay._expire()  # idle: closed, the engine flushed
    assert 1 in relay.closed
    played = g711.decode(codes, law="alaw")
    expected = to_int16(pipeline.extend(np.concatenate([played, np.zeros(rtp.TAIL_SAMPLES)]), system=pipeline.make_system("imaging")).y).astype(np.int64)
    got = relay.out.sent
    assert np.array_equal(relay.out.samples(), expected)
    assert {p.payload_type for p in got} == {96} and len({p.ssrc for p in got}) == 1
    assert all((b.seq - a.seq) & 0xFFFF == 1 and (b.timestamp - a.timestamp) & 0xFFFFFFFF == len(a.payload) // 2 for a, b in zip(got, got[1:]))


def test_a_batched_relay_records_each_streams_rejected_hops_as_offline_extension_does(arctic_refs, tmp_path):
    """``record``: every hop the guard rejects in any stream is written as the offline record of the same
    call writes it (hop, reasons, values, the inputs to recompute it), under the stream's call id, and
    each stream's summary (its hops and seconds) when it ends; the record reads back as any other
    (``nenv audit``)."""
    from nenv.chain import checkpoint
    from nenv.dsp import channel
    from nenv.report import records
    from tests.conftest import narrowed_guard

    ck = narrowed_guard(checkpoint.load(checkpoint.default_path()))
    clips = []
    for i in range(3):
        _, ref = arctic_refs[i % 2]
        clips.append(g711.encode(channel.telephone(ref, sr=16000, law="mulaw")[3200 * i : 3200 * i + 9600], law="mulaw"))
    relay = rtp.Relay(lambda: None, send_to=("127.0.0.1", 9), idle_timeout_s=1.0, batch_model=ck, record=str(tmp_path / "guard.jsonl"), group="arctic")
    relay.out.close()
    relay.out, relay.clock = Sink(), Clock()
    for k in range(clips[0].size // N):
        for i, codes in enumerate(clips):
            relay.handle(_packet(k, ssrc=200 + i, payload=codes[N * k : N * (k + 1)].tobytes()), A)
        relay.step()
        relay.clock.t += 0.02
    out_ssrc = {ssrc: st.out.ssrc for ssrc, st in relay.streams.items()}
    for ssrc, codes in zip(out_ssrc.values(), clips):  # sent step by step, not saved up for the end: all but the
        assert relay.out.samples(ssrc).size > 2 * codes.size - pipeline.LATENCY - rtp.OUT_SAMPLES  # delay and a part packet
    relay.clock.t += 0.375
    relay._expire()  # quiet: each stream's tail is fed ...
    relay.step()  # ... and comes out at the next step
    relay.clock.t += 1.0
    relay._expire()  # idle: closed, summaries written
    assert len(relay.closed) == 3
    relay.stop()
    got = records.read([tmp_path / "guard.jsonl"])
    assert len(got.headers) == 1 and got.skipped_lines == 0 and len(got.summaries) == 3
    for i, codes in enumerate(clips):
        offline = pipeline.make_system("neural", model=ck)  # the call, then the tail's silence, as the relay saw it
        y = pipeline.extend(np.concatenate([g711.decode(codes, law="mulaw"), np.zeros(rtp.TAIL_SAMPLES)]), system=offline).y
        sent = relay.out.samples(out_ssrc[200 + i])  # each stream's own audio, whole, whatever the others sent in the same steps
        assert sent.size == y.size and np.abs(sent - to_int16(y)).max() <= 1  # equal here; one LSB allowed: the network rounds by its batch's rows (atol 1e-6, tests/test_multicall.py)
        want = offline.estimator.record()
        want_hops = np.flatnonzero(want.rejected)
        assert want_hops.size > 0
        (summary,) = [x for x in got.summaries if x["source"].startswith(f"{200 + i:08x}-")]
        mine = [r for r in got.rejects if r["source"] == summary["source"]]
        assert [r["hop"] for r in mine] == want_hops.tolist()
        assert [r["reasons"] for r in mine] == [records.reason_names(int(m)) for m in want.reasons[want_hops]]
        assert [r["values"]["max_k"] for r in mine] == pytest.approx(want.max_k[want_hops].tolist())
        assert all(r["group"] == "arctic" and r["fallback"]["cell"] == int(c) for r, c in zip(mine, want.cell[want_hops]))
        assert summary["hops"] == want.rejected.size and summary["rejected"] == want_hops.size == relay.closed[200 + i].guard_fallbacks
        assert summary["seconds"] == (codes.size + rtp.TAIL_SAMPLES) / 8000  # 1.22 s: the call and the tail's silence


def _serve_for_a_second(monkeypatch, turn):
    """A batched relay's serving loop run for one second of the test's clock, ``select`` replaced by
    one that lets ``turn(timeout)`` seconds pass. Returns the waits asked for and the times (from the
    start) of each step and each look for quiet streams."""
    import types

    from nenv.chain import checkpoint

    relay = rtp.Relay(lambda: None, send_to=("127.0.0.1", 9), batch_model=checkpoint.load(checkpoint.default_path()))
    relay.out.close()
    relay.out, relay.clock = Sink(), Clock()
    relay._last_step = relay._last_expiry = start = relay.clock.t
    waits, steps, looks = [], [], []

    def select(read, write, errors, timeout):
        waits.append(timeout)
        relay.clock.t += turn(timeout)
        if relay.clock.t - start >= 1.0 or len(waits) > 10_000:  # a loop that stopped moving ends too
            relay._stop.set()
        return [], [], []

    monkeypatch.setattr(rtp, "select", types.SimpleNamespace(select=select))
    step, expire = relay.step, relay._expire
    relay.step = lambda: steps.append(relay.clock.t - start) or step()
    relay._expire = lambda heard=None: looks.append(relay.clock.t - start) or expire(heard)
    relay.serve()
    assert relay.tick == 0.02 and rtp.EXPIRY_CHECK_S == 0.02
    return waits, steps, looks


def test_the_serving_loop_steps_once_a_tick_and_looks_for_quiet_streams_every_20_ms(monkeypatch):
    """The loop itself, on the test's clock: ``select`` returns after 1/128 s whatever it was asked to
    wait (as when packets wake the loop), and the loop stops after one second. A batched relay asks to
    wait for the rest of its tick (20 ms), steps at the first turn a whole tick after its last step and
    looks for quiet streams at the first turn EXPIRY_CHECK_S (20 ms) after its last look: with turns of
    1/128 s, both every third turn (3/128 s; every time here is exact in binary floating point)."""
    turn = 1 / 128
    waits, steps, looks = _serve_for_a_second(monkeypatch, lambda timeout: turn)
    assert len(waits) == 128 and waits[:4] == pytest.approx([0.02, 0.02 - turn, 0.02 - 2 * turn, 0.02])
    assert steps == [3 * turn * k for k in range(1, 43)]
    assert looks == steps


def test_a_wait_that_runs_out_is_always_followed_by_a_step(monkeypatch):
    """``select`` lets exactly the time asked for pass (at most 1/128 s): each tick then ends in a step,
    50 in a second. The wait and the step were once computed with different roundings, so the wait
    could round to 0 while the step still saw the tick unfinished; with no time passing the loop turned
    without end (on a real clock, until the clock moved)."""
    waits, steps, _ = _serve_for_a_second(monkeypatch, lambda timeout: min(timeout, 1 / 128))
    assert len(steps) == 50 and min(waits) > 0.004  # every turn let time pass
    np.testing.assert_allclose(np.diff(steps), 0.02, atol=1e-9)
