"""An RTP relay: PCMU/PCMA calls in, wideband L16 out, one call per SSRC.

Receives RTP (RFC 3550) on a UDP port carrying G.711 mu-law (PCMU, static
payload type 0) or A-law (PCMA, payload type 8) at 8 kHz (RFC 3551, Table 4),
extends each stream with its own :class:`nenv.serve.runtime.CallEngine` (or, given a
neural checkpoint as ``batch_model``, as one call of a shared
:class:`nenv.serve.multicall.MultiCallEngine` stepped every ``tick_s``), and sends
the result as RTP L16 at 16 kHz mono (RFC 3551 section 4.5.11: 16-bit signed,
network byte order) with a configurable dynamic payload type, 20 ms per packet.

Per stream: packets up to ``reorder_window`` ahead of the next expected
sequence number wait for the missing ones; a gap that does not fill in time
is declared lost and filled with silence of the gap's timestamp length
(capped); late and duplicate packets are dropped. Sequence numbers and
timestamps wrap modulo 2^16 and 2^32. Malformed packets, wrong payload types
and packets from addresses not allowed are dropped and counted, never raised.
A stream idle for ``idle_timeout_s`` is flushed (its tail sent) and closed.

Robustness (each case counted; docs/rtp-relay.md has the rules): oversized payloads, timestamp
jumps (silence suppression, filled up to ``MAX_FILL``), senders that restart with new sequence
numbers (:class:`nenv.serve.jitter.PlayOut`) or a new SSRC, and an SSRC arriving from a second
address (RFC 3550 section 8.2: held until the stream's own sender has been quiet for
``REBIND_AFTER_S``, then followed, or dropped as a conflict, so two senders never mix). Memory per
stream is bounded; the counters of the last ``MAX_CLOSED`` closed streams are kept. Load: rounds of
the serving loop that ran late and datagrams the system dropped unread are counted, and ``notice``
hears of them (:class:`nenv.serve.load.LoadWatch`).
"""

from __future__ import annotations

import select
import socket
import threading
import time
from typing import Callable

import numpy as np

from nenv.media.audio import to_int16
from nenv.errors import InputError
from nenv.serve import udp
from nenv.serve.load import LoadWatch
from nenv.serve.jitter import LAW_OF_PT, PlayOut, StreamCounters
from nenv.serve.relay_state import RelayCounters, RelayStream
from nenv.serve.rtp_packet import Packetizer, goodbyes, is_rtcp, parse
from nenv.serve.runtime import CallEngine
from nenv.settings import NB_SR

OUT_SAMPLES = 320  # per outgoing packet: 20 ms at 16 kHz
MAX_PAYLOAD = 1600  # bytes: 200 ms of G.711; anything longer is not a telephone packet
REBIND_AFTER_S = 0.1  # quiet time (five 20 ms packet times) of a stream's sender after which its SSRC may come from a new address: a loop or a collision keeps both senders busy, a sender that moved or restarted on a new port has stopped
MAX_CLOSED = 1024  # closed streams whose counters are kept
MAX_NEWCOMER_PACKETS = 16  # packets of another address held per stream while the source may still be sending (0.32 s of 20 ms packets)
RECEIVE_BURST = 256  # datagrams handled per wake-up before the relay checks its clock again
RECEIVE_BUFFER_BYTES = 2**20  # the listening socket's receive buffer (the system caps it): packets that arrive while a batched step runs wait here; about 0.1 s of 200 streams
EXPIRY_CHECK_S = 0.02  # how often quiet and idle streams are looked for
TAIL_AFTER_S = 0.2  # a stream quiet this long (ten packet times) has its held-back tail sent, without ending it (a delay spike of the sender's packets longer than this inserts 20 ms of silence; the relay's own busy time does not count)
TAIL_SAMPLES = 160  # 8 kHz samples of silence that push the tail out (a partial hop and the interpolator's delay)


class Relay:
    """Receive PCMU/PCMA RTP, send L16/16000 RTP; see the module docstring."""
    clock = staticmethod(time.monotonic)  # the relay's time (arrival stamps are on it); tests that drive handle() and _expire() by hand set their own

    def __init__(
        self,
        make_system: Callable[[], object],
        *,
        listen: tuple[str, int] = ("127.0.0.1", 0),
        send_to: tuple[str, int],
        payload_type_out: int = 96,
        allowed_sources: list[str] | None = None,
        max_streams: int = 64,
        reorder_window: int = 4,
        idle_timeout_s: float = 2.0,
        batch_model=None,
        low_band: bool = False,
        tick_s: float = 0.02,
        symmetric: bool = False,
        shared_port: bool = False,
        notice: Callable[[str], None] | None = None,
        record: str | None = None,
        group: str | None = None,
    ):
        """``batch_model``: a loaded neural checkpoint; if given, every stream is a call of one
        :class:`nenv.serve.multicall.MultiCallEngine` (``make_system`` is not used), stepped every
        ``tick_s`` seconds, so all streams share each hop's work (a packet waits at most one tick;
        one tick per usual 20 ms packet time by default, ``0.01`` halves that wait for about twice
        the fixed cost per second). ``symmetric``: send from the listening socket (symmetric RTP, which
        many gateways and NATs expect); the destination must then be of the listening address's
        family. Addresses may be IPv4 or IPv6. ``shared_port``: several relays (one per core) may listen on
        the same port; each sender's packets go to one of them (:func:`nenv.serve.udp.listener`). ``record``: append the guard's decisions to this record
        file (JSON Lines, :mod:`nenv.report.records`; batched neural only), each stream as a source named
        by its call id, with ``group``."""
        if not 96 <= payload_type_out <= 127:
            raise ValueError(f"payload_type_out={payload_type_out}: dynamic payload types are 96-127 (RFC 3551)")
        if record is not None:  # checked before any socket is opened: a refused record leaves nothing half-open
            from nenv.report.records import check_appendable

            if batch_model is None:
                raise InputError("a guard record needs the neural method (only the guard's decisions are recorded)")
            check_appendable(record)
        self.make_system = make_system
        out_family, self.send_to = udp.resolve(send_to)  # once: a name that stops resolving later cannot stop the relay
        self.pt_out = payload_type_out
        self.allowed = {udp.resolve((a, 0))[1][0] for a in allowed_sources} if allowed_sources else None  # names -> addresses, once
        self.max_streams = max_streams
        self.window = reorder_window
        self.idle = idle_timeout_s
        family, listen_at = udp.resolve(listen)
        if symmetric and family != out_family:
            raise InputError("symmetric RTP sends from the listening socket: give the listen and destination addresses in one family (both IPv4 or both IPv6)")
        # non-blocking: serve() waits in select and then reads every datagram waiting
        self.sock = udp.listener(family, listen_at, receive_buffer=RECEIVE_BUFFER_BYTES, shared=shared_port)
        # what the system granted, as it reports it (Linux counts its bookkeeping: twice the size asked for)
        self.receive_buffer = self.sock.getsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF)
        self.address = self.sock.getsockname()
        # RTCP: on the RTP port itself (RFC 5761) and, where it is free, on the port above (RFC 3550 section 11)
        try:
            self.rtcp_sock: socket.socket | None = udp.listener(family, (self.address[0], self.address[1] + 1) + tuple(self.address[2:]), shared=shared_port)
        except OSError:
            self.rtcp_sock = None
        self.out = self.sock if symmetric else socket.socket(out_family, socket.SOCK_DGRAM)
        self.streams: dict[int, RelayStream] = {}
        self.closed: dict[int, StreamCounters] = {}
        self.counters = RelayCounters()
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self.multi = None
        if batch_model is not None:
            from nenv.serve.multicall import MultiCallEngine

            self.multi = MultiCallEngine(batch_model, low_band=low_band)
            self.multi.warm_up()  # before the first packet, not on it
        self.tick = tick_s
        self.records = None
        if record is not None:
            from nenv.report.records import CallRecords, RecordWriter

            writer = RecordWriter(record, checkpoint=batch_model, context=batch_model.features.context, band_trim_db=batch_model.band_trim_db,
                                  keep_going=True, on_failure=notice)  # a full disk stops the record, never the calls
            self.records = CallRecords(writer, group=group)
            self.multi.on_rejected = self.records.rejected
        self._last_step = self._last_expiry = self.clock()
        self._by_call: dict[str, RelayStream] = {}
        self.drops = udp.Drops(self.sock, self.rtcp_sock)  # also asks for arrival stamps (see _receive_all)
        self.load = LoadWatch(self.counters, self.drops.running, step_s=tick_s, notice=notice)

    # ---- lifecycle ---------------------------------------------------------------------
    def start(self) -> "Relay":
        self._thread = threading.Thread(target=self.serve, name="nenv-rtp-relay", daemon=True)
        self._thread.start()
        return self

    @property
    def stop_requested(self) -> bool:
        return self._stop.is_set()

    def request_stop(self) -> None:
        """Ask :meth:`serve` to stop at its next safe point (safe to call from a signal handler, any number of times)."""
        self._stop.set()

    def stop(self) -> None:
        """Stop receiving, flush every stream's tail, close the sockets."""
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout=30)
        else:
            self._shutdown()

    def serve(self) -> None:
        heard = self.clock()  # every packet that arrived before this has been handled
        try:
            while not self._stop.is_set():
                due = self._last_step + self.tick  # the next step's time; the wait and the step below both compare with it
                wait = 0.05 if self.multi is None else max(0.0, due - self.clock())
                ready, _, _ = select.select([self.sock] + ([self.rtcp_sock] if self.rtcp_sock else []), [], [], wait)
                looked = self.clock()  # what arrived before this waits in a ready socket
                now_heard = looked
                for sock in ready:
                    last = self._receive_all(sock, heard)
                    if last is not None:  # datagrams still wait: heard only up to the last one handled
                        now_heard = min(now_heard, last)
                heard = max(heard, now_heard)
                if self.multi is not None and self.clock() >= due:
                    self.step()
                if self.clock() - self._last_expiry >= EXPIRY_CHECK_S:
                    self._expire(heard)
                self.load.round(self.clock() - looked)
        finally:
            self._shutdown()

    def _receive_all(self, sock: socket.socket, heard: float) -> float | None:
        """Handle the datagrams waiting in ``sock`` (up to RECEIVE_BURST; each arrived after ``heard``).
        None if the socket was left empty, else the arrival of the last one handled (all before it were:
        first in, first out), or ``heard`` without arrival stamps. The first and last reads also bring
        the socket's drop count (udp.receive_detailed). docs/rtp-relay.md: overload."""
        arrived = None
        for i in range(RECEIVE_BURST):
            try:
                if i == 0 or i == RECEIVE_BURST - 1:
                    data, addr, arrived, drops = udp.receive_detailed(sock)
                    self.drops.note(sock, drops)
                else:
                    data, addr = sock.recvfrom(65535)
            except (BlockingIOError, InterruptedError):
                return None
            self.handle(data, addr, heard)
        return heard if arrived is None else arrived

    def step(self) -> None:
        """Batched mode: run every queued hop of every stream and send what is ready."""
        self._last_step = self.clock()
        if self.multi is None:
            return
        out = [(self._by_call[call_id], y) for call_id, y in self.multi.step().items() if y.size]
        if not out:
            return
        # every stream's new samples to 16-bit PCM in one conversion (elementwise: the same bytes as one by one)
        pcm = to_int16(np.concatenate([y for _, y in out])).astype(">i2").tobytes()
        pos = 0
        for st, y in out:
            self._send(st, pcm[pos : pos + 2 * y.size], final=st.tail_sent)  # a quiet stream's last, shorter packet goes too
            pos += 2 * y.size

    def _shutdown(self) -> None:
        for ssrc in list(self.streams):
            self._close(ssrc)
        self.counters.system_drops = self.drops.final()
        if self.records is not None:
            self.records.close()
        self.sock.close()
        if self.rtcp_sock is not None:
            self.rtcp_sock.close()
        if self.out is not self.sock:
            self.out.close()

    # ---- packets in ----------------------------------------------------------------------
    def handle(self, data: bytes, addr: tuple[str, int], heard: float | None = None) -> None:
        """One datagram. ``heard`` (default: now) is a moment before which every packet that had
        arrived was handled, so this one arrived after it: a stream's source is known to have been
        quiet, before this packet came, only up to ``heard`` (the relay's own busy time is not the
        source's silence, as in :meth:`_expire`)."""
        if self.allowed is not None and addr[0] not in self.allowed:
            self.counters.not_allowed += 1
            return
        if is_rtcp(data):
            self._rtcp(data, addr)
            return
        pkt = parse(data)
        if pkt is None:
            self.counters.malformed += 1
            return
        if pkt.payload_type not in LAW_OF_PT:
            self.counters.wrong_payload_type += 1
            return
        if len(pkt.payload) > MAX_PAYLOAD:
            self.counters.oversized += 1
            return
        st = self.streams.get(pkt.ssrc)
        if st is not None and st.source != addr:
            # the same SSRC from another transport address: a collision or a loop (RFC 3550 section 8.2),
            # unless the first source has gone quiet (a sender that restarted on a new port, or whose NAT
            # binding changed): its packets are held until REBIND_AFTER_S after the source's last packet,
            # then followed (nothing lost) or, if the source spoke again meanwhile, dropped as conflicts
            if (self.clock() if heard is None else heard) - st.last_seen < REBIND_AFTER_S:
                self._hold_newcomer(st, pkt, addr)
                return
            self._follow_newcomer(st, addr)
        elif st is not None and st.newcomer:
            self.counters.ssrc_conflicts += len(st.newcomer_packets)  # the source is alive: the other is a collision or loop
            st.newcomer, st.newcomer_packets = (), []
        if st is None:
            if len(self.streams) >= self.max_streams:
                self.counters.over_stream_limit += 1
                return
            engine = CallEngine(system=self.make_system()) if self.multi is None else None
            out = Packetizer.starting_at_random(self.pt_out, OUT_SAMPLES)
            st = RelayStream(engine, LAW_OF_PT[pkt.payload_type], PlayOut(pkt, window=self.window), out, self.clock(), source=addr)
            if engine is not None:
                self._count_fallbacks(st)  # the engine keeps no per-hop verdicts: counted here
            else:
                st.call_id = f"{pkt.ssrc:08x}-{self.counters.streams_opened}"
                self.multi.open(st.call_id)
                self._by_call[st.call_id] = st
            self.streams[pkt.ssrc] = st
            self.counters.streams_opened += 1
        st.last_seen = self.clock()
        st.tail_sent = False
        for x in st.playout.push(pkt):
            self._feed(st, x)

    def _hold_newcomer(self, st: RelayStream, pkt, addr: tuple[str, int]) -> None:
        if st.newcomer != addr:  # a third address: the earlier newcomer's packets go
            self.counters.ssrc_conflicts += len(st.newcomer_packets)
            st.newcomer, st.newcomer_packets = addr, []
        st.newcomer_packets.append(pkt)
        if len(st.newcomer_packets) > MAX_NEWCOMER_PACKETS:
            st.newcomer_packets.pop(0)
            self.counters.ssrc_conflicts += 1

    def _follow_newcomer(self, st: RelayStream, addr: tuple[str, int]) -> None:
        """The stream's packets now come from ``addr``: play what that address sent while it was held."""
        held = st.newcomer_packets if st.newcomer == addr else []
        if st.newcomer and st.newcomer != addr:
            self.counters.ssrc_conflicts += len(st.newcomer_packets)
        st.newcomer, st.newcomer_packets = (), []
        st.source = addr
        st.counters.source_changes += 1
        st.last_seen = self.clock()
        st.tail_sent = False
        for pkt in held:
            for x in st.playout.push(pkt):
                self._feed(st, x)

    def _rtcp(self, data: bytes, addr: tuple[str, int]) -> None:
        """An RTCP compound packet: a BYE from a stream's own sender ends that stream at once (its tail
        is sent now, not after the idle timeout); other RTCP is not used."""
        ssrcs = goodbyes(data)
        if ssrcs is None:
            self.counters.malformed += 1
            return
        for ssrc in ssrcs:
            st = self.streams.get(ssrc)
            if st is not None and st.source[0] == addr[0]:  # from the sender's host (RTCP may use another port)
                self._close(ssrc)
                self.counters.goodbyes += 1

    @staticmethod
    def _count_fallbacks(st: RelayStream) -> None:
        est = getattr(st.engine.system, "estimator", None)
        if hasattr(est, "listener"):

            def listen(first_hop, dec, x, a_nb):
                st.counters.guard_fallbacks += int(dec.rejected.sum())

            est.listener = listen

    def _feed(self, st: RelayStream, x: np.ndarray) -> None:
        if st.engine is not None:
            self._emit(st, st.engine.feed(x))
        else:
            self.multi.feed(st.call_id, x)  # processed, with every other stream, at the next step

    # ---- packets out ---------------------------------------------------------------------
    def _emit(self, st: RelayStream, y: np.ndarray, *, final: bool = False) -> None:
        self._send(st, to_int16(y).astype(">i2").tobytes(), final=final)

    def _send(self, st: RelayStream, pcm: bytes, *, final: bool = False) -> None:
        """Send whole packets of the stream's pending output plus ``pcm`` (big-endian int16); with
        ``final`` the rest too, as a last, shorter packet."""
        for packet in st.out.packets(pcm, final=final):
            try:
                self.out.sendto(packet, self.send_to)
            except OSError:  # no route, buffers full, ...: the packet is lost like one on the wire, the relay goes on
                self.counters.send_errors += 1
            st.counters.packets_out += 1

    def _expire(self, heard: float | None = None) -> None:
        """Close streams idle for ``idle_timeout_s``; for streams quiet for TAIL_AFTER_S, push out the
        audio the engine still holds (the end of a call, or the start of a pause) with a little
        silence that counts as part of the pause, so the stream's timing is kept.

        Quiet is measured up to ``heard`` (default: now), the last moment every packet that had
        arrived was handled: time the relay itself spent busy (a long step, with packets waiting in
        the socket) is not the sender's silence, and inserts none."""
        now = self._last_expiry = self.clock()
        heard = now if heard is None else heard
        for ssrc, st in list(self.streams.items()):
            if st.newcomer and heard - st.last_seen >= REBIND_AFTER_S:  # the source stayed quiet: follow the newcomer
                self._follow_newcomer(st, st.newcomer)
            if heard - st.last_seen > self.idle:
                self._close(ssrc)
            elif heard - st.last_seen > TAIL_AFTER_S and not st.tail_sent:
                st.tail_sent = True
                for x in st.playout.pad(TAIL_SAMPLES):
                    self._feed(st, x)
                if st.engine is not None:  # a batched stream's tail comes out at the next step
                    self._send(st, b"", final=True)  # the last, shorter packet too

    def _close(self, ssrc: int) -> None:
        st = self.streams.pop(ssrc)
        for x in st.playout.flush():
            self._feed(st, x)
        if st.engine is not None:
            self._emit(st, st.engine.flush(), final=True)
            st.counters.limited = st.engine.limited
        else:
            stats: dict = {}
            self._emit(st, self.multi.close(st.call_id, stats=stats), final=True)
            del self._by_call[st.call_id]
            st.counters.limited = stats["limited"]
            st.counters.guard_fallbacks = stats["rejected_hops"]
            if self.records is not None:
                self.records.ended(st.call_id, hops=stats["hops"], seconds=stats["samples_in"] / NB_SR)
        self.closed[ssrc] = st.counters
        while len(self.closed) > MAX_CLOSED:
            self.closed.pop(next(iter(self.closed)))
        self.counters.streams_closed += 1
