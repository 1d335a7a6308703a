"""nenv.serve.udp on its own: the relay's listening sockets and what the system's socket table says."""

from __future__ import annotations

import os
import socket
import types

import pytest

from nenv.errors import InputError
from nenv.serve import udp
from tests.conftest import open_descriptors


def test_a_listener_asks_nothing_it_was_not_told_to():
    """By default a listener keeps the system's receive buffer and does not share its port
    (SO_REUSEPORT off); it is bound where asked and does not block."""
    with socket.socket(socket.AF_INET, socket.SOCK_DGRAM) as plain:
        system_default = plain.getsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF)
    sock = udp.listener(socket.AF_INET, ("127.0.0.1", 0))
    try:
        assert sock.getsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF) == system_default
        if hasattr(socket, "SO_REUSEPORT"):
            assert sock.getsockopt(socket.SOL_SOCKET, socket.SO_REUSEPORT) == 0
        assert sock.getsockname()[0] == "127.0.0.1" and sock.getsockname()[1] > 0
        assert sock.getblocking() is False
    finally:
        sock.close()


def test_a_listener_that_cannot_bind_leaves_no_socket_open():
    """A port already taken: bind's OSError reaches the caller, and the socket made for it is closed
    (a relay retried in a loop must not run out of descriptors)."""
    taken = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    taken.bind(("127.0.0.1", 0))
    try:
        before = open_descriptors()
        kept = []  # the errors are kept, as a caller that logs them might: their frames must hold no open socket
        for _ in range(5):
            with pytest.raises(OSError) as e:
                udp.listener(socket.AF_INET, taken.getsockname(), receive_buffer=65536)
            kept.append(e)
        assert open_descriptors() == before
    finally:
        taken.close()


def test_sharing_a_port_is_refused_where_the_system_would_not_spread_senders(monkeypatch):
    """Only Linux's SO_REUSEPORT hands each sender to one of the sockets sharing a port; on another
    system that has the option (BSD, macOS: the last socket bound may get everything) sharing is refused
    before any socket is made."""
    made = []  # this module's view of the system only: other threads keep the real ones
    monkeypatch.setattr(udp, "sys", types.SimpleNamespace(platform="darwin"))
    monkeypatch.setattr(udp, "socket", types.SimpleNamespace(SO_REUSEPORT=15, socket=lambda *a, **k: made.append(a)))
    with pytest.raises(InputError, match="SO_REUSEPORT"):
        udp.listener(socket.AF_INET, ("127.0.0.1", 0), shared=True)
    assert made == []


def test_a_system_without_socket_tables_says_nothing_rather_than_none_dropped(monkeypatch, tmp_path):
    """No /proc/net/udp (not Linux): the table is unknown (None), and so is the drop count, never 0."""
    monkeypatch.setattr(udp, "_PROC_TABLES", (str(tmp_path / "udp"), str(tmp_path / "udp6")))
    assert udp.sockets() is None
    with socket.socket(socket.AF_INET, socket.SOCK_DGRAM) as s:
        s.bind(("127.0.0.1", 0))
        assert udp.dropped(s) is None
    (tmp_path / "udp6").write_text("  sl  local_address rem_address   st tx_queue rx_queue tr tm->when retrnsmt   uid  timeout inode ref pointer drops\n")
    assert udp.sockets() == []  # one table, empty: known, and nothing in it


def test_drops_are_summed_over_the_sockets_asked_about_from_their_rows_in_the_table(monkeypatch, tmp_path):
    """``dropped``: the drops column (13th) of each socket's row, found by its inode (10th), summed
    over IPv4 and IPv6; a row cut short is skipped, and a socket with no row of its own makes the
    count unknown (None), not smaller."""
    header = "  sl  local_address rem_address   st tx_queue rx_queue tr tm->when retrnsmt   uid  timeout inode ref pointer drops\n"

    def row(inode: int | str, drops: int | None) -> str:
        cols = ["0:", "0100007F:1F40", "00000000:0000", "07", "00000000:00000000", "00:00000000", "00000000", "1000", "0", str(inode)]
        return " ".join(cols + (["2", "0000000000000000", str(drops)] if drops is not None else ["2", "0000000000000000"])) + "\n"

    a, b = socket.socket(socket.AF_INET, socket.SOCK_DGRAM), socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    try:
        ia, ib = os.fstat(a.fileno()).st_ino, os.fstat(b.fileno()).st_ino
        (tmp_path / "udp").write_text(header + row(ia, 5) + row(ia + ib + 1, 1000) + row(ib, None))
        (tmp_path / "udp6").write_text(header + row(ib, 7))
        monkeypatch.setattr(udp, "_PROC_TABLES", (str(tmp_path / "udp"), str(tmp_path / "udp6")))
        assert [len(cols) for cols in udp.sockets()] == [13, 13, 12, 13]
        assert udp.dropped(a) == 5 and udp.dropped(b) == 7 and udp.dropped(a, b) == 12
        (tmp_path / "udp6").write_text(header)
        assert udp.dropped(a) == 5 and udp.dropped(b) is None and udp.dropped(a, b) is None
        b.close()
        assert udp.dropped(b) is None  # a closed socket has no inode to look for
    finally:
        a.close()
        b.close()


def test_no_arrival_details_where_the_system_cannot_give_them(monkeypatch):
    """Without either socket option, or without ancillary data (CMSG_SPACE), the relay is told there
    are no per-datagram details and reads plain datagrams: (data, address, None, None)."""
    for name, value in (("_SO_TIMESTAMPNS", None), ("_SO_RXQ_OVFL", None), ("_ANCILLARY", 0)):
        with monkeypatch.context() as m:
            m.setattr(udp, name, value)
            with socket.socket(socket.AF_INET, socket.SOCK_DGRAM) as r:
                assert udp.detail_arrivals(r) is False, name
    monkeypatch.setattr(udp, "_ANCILLARY", 0)
    with socket.socket(socket.AF_INET, socket.SOCK_DGRAM) as r, socket.socket(socket.AF_INET, socket.SOCK_DGRAM) as t:
        r.bind(("127.0.0.1", 0))
        t.sendto(b"plain", r.getsockname())
        r.settimeout(5.0)
        data, addr, arrival, drops = udp.receive_detailed(r)
        assert (data, addr[1], arrival, drops) == (b"plain", t.getsockname()[1], None, None)


def test_a_socket_that_refuses_the_options_gets_no_arrival_details():
    """A system that names both options but refuses them on this socket (an older kernel): False, and
    the relay goes on without details."""

    class Refusing:
        def setsockopt(self, *args):
            raise OSError(92, "Protocol not available")

    assert udp.detail_arrivals(Refusing()) is False


def test_a_socket_not_asked_for_details_reads_as_one_without_them():
    """``receive_detailed`` on a socket that was never given the options (a second listening socket
    the system refused them): no arrival and no drop count, not a count of 0."""
    with socket.socket(socket.AF_INET, socket.SOCK_DGRAM) as r, socket.socket(socket.AF_INET, socket.SOCK_DGRAM) as t:
        r.bind(("127.0.0.1", 0))
        t.sendto(b"bare", r.getsockname())
        r.settimeout(5.0)
        data, _, arrival, drops = udp.receive_detailed(r)
        assert (data, arrival, drops) == (b"bare", None, None)


def test_the_two_clocks_are_paired_from_a_reading_not_interrupted_for_0_2_ms(monkeypatch):
    """The wall clock is read between two monotonic readings; a pair more than 0.2 ms apart (the
    thread was interrupted) is read again, up to three times, and the midpoint of the pair kept."""

    def readings(monotonic, wall):
        m, w = iter(monotonic), iter(wall)
        return (lambda: next(m)), (lambda: next(w))

    cases = [
        ([0.0, 2e-4, 5.0, 5.0001, 9.0, 9.00005], [100.0, 200.0, 300.0], (5.00005, 200.0)),  # 0.2 ms apart is too long; 0.1 ms is not
        ([3.0, 3.00005], [100.0], (3.000025, 100.0)),
        ([0.0, 0.01, 1.0, 1.01, 2.0, 2.01, 3.0, 3.0], [100.0, 200.0, 300.0, 400.0], (2.005, 300.0)),  # three tries, then the last
    ]
    for monotonic, wall, expected in cases:
        mono, clock = readings(monotonic, wall)
        with monkeypatch.context() as m:
            m.setattr(udp, "time", types.SimpleNamespace(monotonic=mono, time=clock))  # this module's clocks only
            got = udp._clocks()
        assert got == pytest.approx(expected, abs=1e-12), (monotonic, got)
