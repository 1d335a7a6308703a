"""One RTP stream's play-out order: reordering, loss, suppressed silence and sender restarts.

Pure logic, no sockets and no clock, so every rule is tested packet by packet
(``tests/test_jitter.py``). :class:`PlayOut` takes the packets of one SSRC in arrival
order and returns the 8 kHz audio to play, in order: decoded payloads, silence for lost
packets and for suppressed silence. Sequence numbers are judged as in RFC 3550 appendix
A.1: a packet fewer than ``MAX_DROPOUT`` ahead of the next expected one is in order (with a
gap), one fewer than ``MAX_MISORDER`` behind is late or a copy, and anything farther is a
probable restart of the sender's numbering, followed once the next packet confirms it
(the two are played; nothing is counted lost).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from nenv.dsp import g711
from nenv.serve.rtp_packet import RtpPacket

LAW_OF_PT = {0: "mulaw", 8: "alaw"}  # RFC 3551 static payload types: PCMU, PCMA
MAX_FILL = 8000  # samples: longest gap filled with silence (1 s); a longer timestamp jump restarts the timing
MAX_DROPOUT = 3000  # RFC 3550 appendix A.1: a jump ahead this large or larger is no longer a gap but a probable restart
MAX_MISORDER = 100  # RFC 3550 appendix A.1: a packet fewer behind is late; this far or farther, a probable restart


@dataclass
class StreamCounters:
    packets: int = 0
    samples_in: int = 0
    late_or_duplicate: int = 0
    lost_packets: int = 0
    filled_samples: int = 0
    arrived_early: int = 0
    packets_out: int = 0
    limited: int = 0
    silence_filled: int = 0  # samples of silence inserted for timestamp jumps (silence suppression)
    timing_restarts: int = 0  # timestamp jumps too long to fill
    resyncs: int = 0  # sender restarts with the same SSRC (RFC 3550 A.1), followed without loss
    guard_fallbacks: int = 0  # hops where the guard replaced the network's envelope by the codebook's
    source_changes: int = 0  # the sender's address or port changed after a quiet spell (followed)


class PlayOut:
    """The play-out order of one stream: ``push`` a packet, get the audio now ready to play.

    Packets up to ``window`` ahead of the next expected one wait for the missing ones; when more
    are waiting, the missing ones are declared lost (their timestamp span filled with silence, at
    most MAX_FILL samples). Memory is bounded: at most ``window + 1`` packets wait, plus one
    restart candidate.
    """

    def __init__(self, first: RtpPacket, *, window: int, counters: StreamCounters | None = None):
        self.window = window
        self.counters = counters if counters is not None else StreamCounters()
        self.next_seq, self.next_ts = first.seq, first.timestamp
        self.held: dict[int, RtpPacket] = {}
        self.candidate: RtpPacket | None = None  # the first packet after a very large jump, awaiting its successor

    def push(self, pkt: RtpPacket) -> list[np.ndarray]:
        """Take one packet of this stream; return the 8 kHz audio ready to play (possibly none)."""
        c = self.counters
        delta = (pkt.seq - self.next_seq) & 0xFFFF
        if pkt.seq in self.held:
            c.late_or_duplicate += 1
            return []
        if delta < MAX_DROPOUT:  # in order, or ahead with a gap that may still fill
            if delta:
                c.arrived_early += 1
            self.held[pkt.seq] = pkt
            c.packets += 1
            return self._drain(force=False)
        if delta <= 0x10000 - MAX_MISORDER:  # a very large jump, ahead or back: a probable restart
            cand, self.candidate = self.candidate, None
            if cand is None or pkt.seq != (cand.seq + 1) & 0xFFFF:
                if cand is not None:
                    c.late_or_duplicate += 1  # an unconfirmed stray
                self.candidate = pkt
                return []
            # two packets in sequence far from the old numbering: the sender restarted (RFC 3550 A.1)
            out = self._drain(force=True)
            self.next_seq, self.next_ts = cand.seq, cand.timestamp
            self.held = {cand.seq: cand, pkt.seq: pkt}
            c.packets += 2
            c.resyncs += 1
            return out + self._drain(force=False)
        c.late_or_duplicate += 1  # behind the play-out point, by fewer than MAX_MISORDER
        return []

    def pad(self, n: int) -> list[np.ndarray]:
        """``n`` samples of silence played now, ahead of the packets still to come: counted as
        suppressed silence, and taken off the next timestamp jump so the timing is kept. Only
        when nothing is waiting (a quiet stream); otherwise nothing."""
        if self.held:
            return []
        self.next_ts = (self.next_ts + n) & 0xFFFFFFFF
        self.counters.silence_filled += n
        return [np.zeros(n)]

    def flush(self) -> list[np.ndarray]:
        """The end of the stream: play every packet still waiting (gaps declared lost)."""
        return self._drain(force=True)

    def _drain(self, *, force: bool) -> list[np.ndarray]:
        out: list[np.ndarray] = []
        c = self.counters
        while self.held:
            pkt = self.held.pop(self.next_seq, None)
            if pkt is not None:
                out += self._play(pkt)
                continue
            if not force and len(self.held) <= self.window:
                break
            # the next expected packet did not come in time: declare it (and any run) lost
            nearest = min(self.held, key=lambda s: (s - self.next_seq) & 0xFFFF)
            gap = (self.held[nearest].timestamp - self.next_ts) & 0xFFFFFFFF
            c.lost_packets += (nearest - self.next_seq) & 0xFFFF
            if 0 < gap <= MAX_FILL:
                c.filled_samples += gap
                out.append(np.zeros(gap))
            self.next_seq = nearest
            self.next_ts = self.held[nearest].timestamp
        return out

    def _play(self, pkt: RtpPacket) -> list[np.ndarray]:
        out = []
        c = self.counters
        jump = (pkt.timestamp - self.next_ts) & 0xFFFFFFFF
        if 0 < jump < 0x80000000:  # consecutive packets, later timestamp: suppressed silence
            if jump <= MAX_FILL:
                c.silence_filled += jump
                out.append(np.zeros(jump))
            else:
                c.timing_restarts += 1
        x = g711.decode(np.frombuffer(pkt.payload, dtype=np.uint8), law=LAW_OF_PT[pkt.payload_type])
        c.samples_in += x.size
        self.next_seq = (pkt.seq + 1) & 0xFFFF
        self.next_ts = (pkt.timestamp + x.size) & 0xFFFFFFFF
        out.append(x)
        return out
