"""What an RTP relay (:mod:`nenv.serve.rtp`) keeps: each stream's state, and its counters over all streams."""

from __future__ import annotations

from dataclasses import dataclass, field

from nenv.serve.jitter import PlayOut, StreamCounters
from nenv.serve.rtp_packet import Packetizer
from nenv.serve.runtime import CallEngine


@dataclass
class RelayStream:
    """One stream (SSRC) the relay is carrying."""

    engine: CallEngine | None  # None in batched mode (the relay's MultiCallEngine holds the call)
    law: str
    playout: PlayOut
    out: Packetizer
    last_seen: float
    call_id: str = ""
    source: tuple = ()  # the transport address (host, port) the stream's packets come from
    tail_sent: bool = False  # its held-back tail went out during the current quiet spell
    newcomer: tuple = ()  # another address sending this SSRC while the source may still be sending
    newcomer_packets: list = field(default_factory=list)  # its packets, held until the source is known to be quiet

    @property
    def counters(self) -> StreamCounters:
        return self.playout.counters


@dataclass
class RelayCounters:
    """Counts over all of a relay's streams (each stream's own are its play-out's :class:`StreamCounters`)."""

    malformed: int = 0
    oversized: int = 0
    wrong_payload_type: int = 0
    not_allowed: int = 0
    over_stream_limit: int = 0
    streams_opened: int = 0
    streams_closed: int = 0
    ssrc_conflicts: int = 0  # packets dropped: an SSRC in use by another sender (collision or loop)
    send_errors: int = 0  # output packets the system refused to send (they are counted as sent for numbering)
    goodbyes: int = 0  # streams closed at once by their sender's RTCP BYE
    late_rounds: int = 0  # rounds of receiving and stepping busier than LATE_AFTER_STEPS steps (nenv.serve.load)
    longest_round_ms: float = 0.0  # the longest round of all (packets that arrived meanwhile waited that long to be read)
    system_drops: int | None = None  # datagrams the system dropped unread, the socket buffer full (Linux; None where unknown)
