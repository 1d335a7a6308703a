"""What the relay asks the system about its UDP sockets: addresses, arrival times, and datagrams
dropped unread.

A datagram that arrives while a socket's receive buffer is full is dropped by the system before the
relay can see it; Linux counts such drops per socket (the ``drops`` column of ``/proc/net/udp`` and
``/proc/net/udp6``, the socket found by its inode). Elsewhere the count is unknown (None).

When the relay reads a socket that stays busy, the moment a datagram *arrived* can lie well before
the moment it is read; the system stamps each datagram on arrival (``SO_TIMESTAMPNS``, Linux, in
wall-clock time), and :func:`receive_stamped` gives that moment on the monotonic clock.
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


# Python's socket module has no name for it: 35 is SO_TIMESTAMPNS in Linux's asm-generic/socket.h, which
# these architectures use (alpha, parisc and sparc number it otherwise: no stamps there)
_SO_TIMESTAMPNS = getattr(socket, "SO_TIMESTAMPNS", 35 if sys.platform.startswith("linux") and platform.machine() in {"x86_64", "aarch64", "ppc64le", "s390x", "riscv64"} else None)
_STAMP = struct.Struct("@qq")  # struct timespec of a 64-bit system: seconds, nanoseconds
_ANCILLARY = socket.CMSG_SPACE(_STAMP.size) if hasattr(socket, "CMSG_SPACE") else 0


def stamp_arrivals(sock: socket.socket) -> bool:
    """Ask the system to stamp each datagram ``sock`` receives with its arrival time; False where it
    cannot (then :func:`receive_stamped` gives no time)."""
    if _SO_TIMESTAMPNS is None or not _ANCILLARY:
        return False
    try:
        sock.setsockopt(socket.SOL_SOCKET, _SO_TIMESTAMPNS, 1)
    except OSError:
        return False
    return True


def receive_stamped(sock: socket.socket) -> tuple[bytes, tuple, float | None]:
    """One datagram of a non-blocking socket: ``(data, address, arrival)``, the arrival on the
    :func:`time.monotonic` clock (None without a stamp: see :func:`stamp_arrivals`). The stamp is
    wall-clock time, moved to the monotonic clock by the two clocks' offset when it is read and never
    later than that read. Raises BlockingIOError when nothing waits, as ``recvfrom`` does."""
    if not _ANCILLARY:
        data, addr = sock.recvfrom(65535)
        return data, addr, None
    data, ancillary, _, addr = sock.recvmsg(65535, _ANCILLARY)
    mono, wall = time.monotonic(), time.time()
    for level, kind, value in ancillary:
        if level == socket.SOL_SOCKET and kind == _SO_TIMESTAMPNS and len(value) == _STAMP.size:
            seconds, nanoseconds = _STAMP.unpack_from(value)
            return data, addr, min(mono, mono - (wall - (seconds + nanoseconds * 1e-9)))
    return data, addr, None
