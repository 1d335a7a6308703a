"""How far behind a relay runs: rounds of its serving loop that kept it busy too long, and datagrams
the system dropped unread because the listening socket's buffer was full.

A round is one pass of the serving loop: read every datagram waiting, step the batched engine when
its time has come, expire quiet streams. Packets that arrive meanwhile wait in the socket, so a
round's length is how long they waited to be read. A batched relay's packet waits up to one step by
design; a round busier than LATE_AFTER_STEPS steps is late (the receiver's jitter buffer sees the
delay), and a socket buffer that overflows loses packets before the relay can see them.
"""

from __future__ import annotations

import time
from typing import Callable

from nenv.words import count

LATE_AFTER_STEPS = 2  # a round busier than this many steps is late
NOTICE_EVERY_S = 60.0  # how often the load is looked at for a notice


class LoadWatch:
    """Keeps a relay's load counters (``late_rounds``, ``longest_round_ms`` of its counters object)
    and, every NOTICE_EVERY_S at most, tells ``notice`` of late rounds and system drops
    (``drops()``: the socket's count so far, or None where the system does not say) since it last
    looked; nothing when there were none."""

    def __init__(self, counters, drops: Callable[[], int | None], *, step_s: float, notice: Callable[[str], None] | None = None):
        self.counters, self.drops, self.step_s, self.notice = counters, drops, step_s, notice
        self._looked = (time.monotonic(), 0, 0)  # when the load was last looked at, the late rounds and drops then
        self._longest = 0.0  # the longest late round since then [s]

    def round(self, busy_s: float) -> None:
        """One round of the serving loop, which kept the relay busy for ``busy_s`` seconds."""
        c = self.counters
        c.longest_round_ms = max(c.longest_round_ms, 1e3 * busy_s)
        if busy_s > LATE_AFTER_STEPS * self.step_s:
            c.late_rounds += 1
            self._longest = max(self._longest, busy_s)
        if self.notice is not None and time.monotonic() - self._looked[0] >= NOTICE_EVERY_S:
            self._tell()

    def _tell(self) -> None:
        since, rounds, drops = self._looked
        c, now_drops = self.counters, self.drops() or 0
        news = [f"{count(c.late_rounds - rounds, 'round')} busier than {LATE_AFTER_STEPS} steps of {1e3 * self.step_s:g} ms (the longest "
                f"{1e3 * self._longest:.0f} ms: packets waited that long to be read)"] if c.late_rounds > rounds else []
        news += [f"{count(now_drops - drops, 'datagram')} dropped by the system unread (socket buffer full)"] if now_drops > drops else []
        if news:
            self.notice(f"running late: in the last {time.monotonic() - since:.0f} s, {' and '.join(news)}; if this recurs, run fewer streams per relay process")
        self._looked, self._longest = (time.monotonic(), c.late_rounds, now_drops), 0.0
