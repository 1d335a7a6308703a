"""What the relay asks the system about its UDP sockets: addresses, arrival times, and datagrams
dropped unread.

A datagram that arrives while a socket's receive buffer is full is dropped by the system before the
relay can see it; Linux counts such drops per socket (the ``drops`` column of ``/proc/net/udp`` and
``/proc/net/udp6``, the socket found by its inode). Elsewhere the count is unknown (None).

When the relay reads a socket that stays busy, the moment a datagram *arrived* can lie well before
the moment it is read; the system stamps each datagram on arrival (``SO_TIMESTAMPNS``, Linux, in
wall-clock time), and :func:`receive_detailed` gives that moment on the monotonic clock, with the
socket's drop count (``SO_RXQ_OVFL``). That count costs nothing to read, where ``/proc/net/udp`` lists
every UDP socket of the host (a gateway may hold tens of thousands: reading it then takes a quarter
of a second), so a running relay uses the first and reads the table only when it stops.
"""

from __future__ import annotations

import os
import platform
import socket
import struct
import sys
import time

from nenv.errors import InputError

_PROC_TABLES = ("/proc/net/udp", "/proc/net/udp6")
_INODE, _DROPS = 9, 12  # columns of a socket's line in those tables (after sl, addresses, state, queues, timers, uid)


def resolve(address: tuple[str, int]) -> tuple[int, tuple]:
    """``(family, socket address)`` of ``(host, port)``, IPv4 or IPv6 (the first the resolver gives);
    InputError if it does not resolve."""
    host, port = address[0], address[1]
    try:
        info = socket.getaddrinfo(host, port, socket.AF_UNSPEC, socket.SOCK_DGRAM)
    except (socket.gaierror, UnicodeError) as e:
        raise InputError(f"cannot resolve '{host}': {e.strerror if isinstance(e, socket.gaierror) else e}") from e
    return info[0][0], info[0][4]


def listener(family: int, address: tuple, *, receive_buffer: int = 0, shared: bool = False) -> socket.socket:
    """A non-blocking UDP socket bound to ``address``, with a receive buffer of ``receive_buffer`` bytes
    asked for (the system caps it; 0: the system's default). ``shared``: other processes of this user
    may bind the same port (SO_REUSEPORT), and the system hands each sender's datagrams (by source
    address and port) to one of them. Raises OSError as ``bind`` does, InputError where the system
    does not share a port that way (Linux does; elsewhere SO_REUSEPORT may give every datagram to one)."""
    if shared and not (sys.platform.startswith("linux") and hasattr(socket, "SO_REUSEPORT")):
        raise InputError("sharing a port among relays needs Linux's SO_REUSEPORT, which spreads senders over them")
    sock = socket.socket(family, socket.SOCK_DGRAM)
    try:
        if receive_buffer:
            sock.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, receive_buffer)
        if shared:
            sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEPORT, 1)
        sock.bind(address)
        sock.setblocking(False)
    except OSError:
        sock.close()
        raise
    return sock


def sockets() -> list[list[str]] | None:
    """The system's table of UDP sockets, IPv4 and IPv6, one list of columns per socket (Linux:
    local address:port in hex at 1, inode at 9, drops at 12); None where the system keeps none."""
    rows, seen = [], False
    for table in _PROC_TABLES:
        try:
            with open(table) as f:
                rows += [line.split() for line in f.read().splitlines()[1:]]
            seen = True
        except OSError:
            continue
    return rows if seen else None


def dropped(*socks: socket.socket) -> int | None:
    """Datagrams the system dropped for these open sockets because a receive buffer was full, in all
    (Linux); None where the system does not say."""
    try:
        inodes = {str(os.fstat(s.fileno()).st_ino) for s in socks}
    except (OSError, ValueError):  # a closed socket
        return None
    mine = [cols for cols in sockets() or [] if len(cols) > _DROPS and cols[_INODE] in inodes]
    return sum(int(cols[_DROPS]) for cols in mine) if {cols[_INODE] for cols in mine} == inodes else None


# Python's socket module names neither option: 35 and 40 are SO_TIMESTAMPNS and SO_RXQ_OVFL in Linux's
# asm-generic/socket.h, which these architectures use (alpha, parisc and sparc number them otherwise)
_GENERIC = sys.platform.startswith("linux") and platform.machine() in {"x86_64", "aarch64", "ppc64le", "s390x", "riscv64"}
_SO_TIMESTAMPNS = getattr(socket, "SO_TIMESTAMPNS", 35 if _GENERIC else None)
_SO_RXQ_OVFL = getattr(socket, "SO_RXQ_OVFL", 40 if _GENERIC else None)
_STAMP = struct.Struct("@qq")  # struct timespec of a 64-bit system: seconds, nanoseconds
_DROPS_SEEN = struct.Struct("@I")  # the socket's drop count when the datagram was queued
_ANCILLARY = socket.CMSG_SPACE(_STAMP.size) + socket.CMSG_SPACE(_DROPS_SEEN.size) if hasattr(socket, "CMSG_SPACE") else 0


def detail_arrivals(sock: socket.socket) -> bool:
    """Ask the system to give each datagram ``sock`` receives with its arrival time and the socket's
    count of datagrams dropped so far (Linux: SO_TIMESTAMPNS, SO_RXQ_OVFL); False where it cannot
    (then :func:`receive_detailed` gives neither)."""
    if _SO_TIMESTAMPNS is None or _SO_RXQ_OVFL is None or not _ANCILLARY:
        return False
    try:
        sock.setsockopt(socket.SOL_SOCKET, _SO_TIMESTAMPNS, 1)
        sock.setsockopt(socket.SOL_SOCKET, _SO_RXQ_OVFL, 1)
    except OSError:
        return False
    return True


def receive_detailed(sock: socket.socket) -> tuple[bytes, tuple, float | None, int | None]:
    """One datagram of a non-blocking socket: ``(data, address, arrival, drops)``. ``arrival`` is on the
    :func:`time.monotonic` clock: the system's wall-clock stamp moved by the two clocks' offset when it
    is read, never later than that read. ``drops`` is how many datagrams the socket had dropped (buffer
    full) when this one was queued: a count that only grows, and lags the drops after it. Both None
    where the system gives no details (:func:`detail_arrivals`). Raises BlockingIOError when nothing
    waits, as ``recvfrom`` does."""
    if not _ANCILLARY:
        data, addr = sock.recvfrom(65535)
        return data, addr, None, None
    data, ancillary, _, addr = sock.recvmsg(65535, _ANCILLARY)
    mono, wall = _clocks()
    arrival, drops = None, None
    for level, kind, value in ancillary:
        if level != socket.SOL_SOCKET:
            continue
        if kind == _SO_TIMESTAMPNS and len(value) == _STAMP.size:
            seconds, nanoseconds = _STAMP.unpack_from(value)
            arrival = min(mono, mono - (wall - (seconds + nanoseconds * 1e-9)))
        elif kind == _SO_RXQ_OVFL and len(value) == _DROPS_SEEN.size:
            (drops,) = _DROPS_SEEN.unpack_from(value)
    if arrival is not None and drops is None:
        drops = 0  # the system sends the count only once the socket has dropped something
    return data, addr, arrival, drops


def _clocks() -> tuple[float, float]:
    """The monotonic and the wall clock at one moment: the wall clock read between two monotonic
    readings, paired with their midpoint, read again (up to three times) if the thread was
    interrupted in between for more than 0.2 ms."""
    for _ in range(3):
        m0 = time.monotonic()
        wall = time.time()
        m1 = time.monotonic()
        if m1 - m0 < 2e-4:
            break
    return 0.5 * (m0 + m1), wall


class Drops:
    """The system's count of datagrams dropped unread (buffer full) for a relay's listening sockets:
    while serving, as last seen on a datagram (:meth:`note`; a lower bound that lags a little, and
    never a read of the host's whole socket table), and from that table when the relay stops. Where
    the system gives no per-datagram count, both read the table."""

    def __init__(self, *socks: socket.socket | None):
        self.socks = [s for s in socks if s is not None]
        self.seen = {s: 0 for s in self.socks if detail_arrivals(s)}
        self.detailed = len(self.seen) == len(self.socks)

    def note(self, sock: socket.socket, drops: int | None) -> None:
        """The count a datagram of ``sock`` came with (:func:`receive_detailed`)."""
        if drops is not None and sock in self.seen:
            self.seen[sock] = max(self.seen[sock], drops)

    def running(self) -> int | None:
        return sum(self.seen.values()) if self.detailed else self.final()

    def final(self) -> int | None:
        return dropped(*self.socks)
