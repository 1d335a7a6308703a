"""RTP packets (RFC 3550 section 5.1): parsing what arrives, building what is sent."""

from __future__ import annotations

import os
import struct
from dataclasses import dataclass

HEADER = struct.Struct("!BBHII")  # V/P/X/CC, M/PT, sequence number, timestamp, SSRC


@dataclass(frozen=True)
class RtpPacket:
    payload_type: int
    marker: bool
    seq: int
    timestamp: int
    ssrc: int
    payload: bytes


def parse(data: bytes) -> RtpPacket | None:
    """Parse one RTP packet (RFC 3550 section 5.1); None if it is not a valid RTP version 2 packet."""
    if len(data) < HEADER.size:
        return None
    b0, b1, seq, ts, ssrc = HEADER.unpack_from(data)
    if b0 >> 6 != 2:
        return None
    pos = HEADER.size + 4 * (b0 & 0x0F)  # CSRC list
    if b0 & 0x10:  # header extension: 16-bit profile, 16-bit length in 32-bit words
        if len(data) < pos + 4:
            return None
        (ext_words,) = struct.unpack_from("!H", data, pos + 2)
        pos += 4 + 4 * ext_words
    end = len(data)
    if b0 & 0x20:  # padding: the last octet counts the padding octets
        if data[-1] == 0 or data[-1] > end - pos:  # (end >= 12: the header was read)
            return None
        end -= data[-1]
    if pos > end:
        return None
    return RtpPacket(b1 & 0x7F, bool(b1 & 0x80), seq, ts, ssrc, bytes(data[pos:end]))


def build(*, payload_type: int, seq: int, timestamp: int, ssrc: int, payload: bytes, marker: bool = False) -> bytes:
    """An RTP version 2 packet with no CSRC, extension or padding."""
    return HEADER.pack(0x80, (0x80 if marker else 0) | (payload_type & 0x7F), seq & 0xFFFF, timestamp & 0xFFFFFFFF, ssrc & 0xFFFFFFFF) + payload


@dataclass
class Packetizer:
    """One outgoing stream of 16-bit PCM packets: its SSRC, next sequence number and timestamp (random
    starts, RFC 3550 section 5.1), and the output not yet sent (less than a packet)."""

    payload_type: int
    samples_per_packet: int
    ssrc: int
    seq: int
    timestamp: int
    pending: bytes = b""  # big-endian 16-bit samples
    sent: int = 0

    @classmethod
    def starting_at_random(cls, payload_type: int, samples_per_packet: int) -> "Packetizer":
        r = os.urandom(10)
        return cls(payload_type, samples_per_packet, int.from_bytes(r[:4], "big"), int.from_bytes(r[4:6], "big"), int.from_bytes(r[6:], "big"))

    def packets(self, pcm: bytes, *, final: bool = False) -> list[bytes]:
        """Whole packets of the pending output plus ``pcm`` (big-endian int16); the rest waits for the
        next call, or with ``final`` goes as a last, shorter packet. The first packet carries the marker
        bit (the stream's first talkspurt, RFC 3551 section 4.1)."""
        buf = self.pending + pcm if self.pending else pcm
        size = 2 * self.samples_per_packet
        n_full = len(buf) if final else len(buf) // size * size
        out = []
        for s in range(0, n_full, size):
            payload = buf[s : min(s + size, n_full)]
            out.append(build(payload_type=self.payload_type, seq=self.seq, timestamp=self.timestamp, ssrc=self.ssrc, payload=payload, marker=self.sent == 0))
            self.seq = (self.seq + 1) & 0xFFFF
            self.timestamp = (self.timestamp + len(payload) // 2) & 0xFFFFFFFF
            self.sent += 1
        self.pending = buf[n_full:]
        return out


RTCP_BYE = 203  # RFC 3550 section 6.6
RTCP_TYPES = range(192, 224)  # RFC 5761 section 4: the second octet of an RTCP packet on a shared port


def is_rtcp(data: bytes) -> bool:
    """True for an RTCP packet arriving on the RTP port (RFC 5761 section 4: multiplexed by the second octet)."""
    return len(data) >= 2 and data[1] in RTCP_TYPES


def goodbyes(data: bytes) -> list[int] | None:
    """The SSRCs that leave in an RTCP compound packet (its BYE packets, RFC 3550 section 6.6);
    None if the datagram is not a valid RTCP compound packet (version 2, lengths that add up)."""
    ssrcs: list[int] = []
    pos = 0
    while pos < len(data):
        if len(data) - pos < 4 or data[pos] >> 6 != 2:
            return None
        end = pos + 4 * (int.from_bytes(data[pos + 2 : pos + 4], "big") + 1)
        if end > len(data):
            return None
        if data[pos + 1] == RTCP_BYE:
            count = data[pos] & 0x1F
            if 4 + 4 * count > end - pos:
                return None
            ssrcs += [int.from_bytes(data[pos + 4 + 4 * i : pos + 8 + 4 * i], "big") for i in range(count)]
        pos = end
    return ssrcs


def bye(ssrcs: list[int]) -> bytes:
    """An RTCP BYE packet for ``ssrcs`` (no reason given)."""
    return bytes([0x80 | len(ssrcs), RTCP_BYE]) + len(ssrcs).to_bytes(2, "big") + b"".join(s.to_bytes(4, "big") for s in ssrcs)
