"""Relay capacity over real sockets (a benchmark, not a test; nothing is asserted).

Run: python tests/bench/bench_relay.py [--streams 25 50 100] [--seconds 10] [--model DIR] [--hold-freed-memory]

For each number of streams N, starts ``nenv relay`` (neural, the shipped model) as its own
process on loopback, sends N PCMU streams of 20 ms packets paced in real time (streams staggered
across the packet time, as independent callers are) and receives the L16 output. Prints, per N:

  * the relay process's CPU time over the sending window, as a share of one core
    (it keeps up while this stays clearly below 100%);
  * the output backlog per stream (input sent minus output received, in ms of audio, mean over
    streams) half-way
    and at the end of sending: steady = keeping up (the reorder window and one step of the
    batched engine make up most of it); growing = falling behind;
  * how much of the expected output arrived in the end (every stream is flushed when it goes idle);
  * the relay's own load line when it stops: its longest round, its rounds busier than two steps
    and the datagrams the system dropped unread (docs/rtp-relay.md, "Load").

The sender and receiver run in this process, the relay in another: on a 2-core machine each has
a core. Measured numbers belong in the README's performance section with this command.
"""

from __future__ import annotations

import argparse
import os
import socket
import subprocess
import sys
import threading
import time
from collections import defaultdict
from pathlib import Path

import numpy as np

from nenv.dsp import channel, g711
from nenv.serve import rtp, rtp_packet
from nenv.report.evaluate import prepare_reference

DATA = Path(__file__).resolve().parents[1] / "data"
PACKET = 160  # samples of 8 kHz per 20 ms packet


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_DGRAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _cpu_seconds(pid: int) -> float:
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")  # utime + stime


class _Receiver(threading.Thread):
    def __init__(self, port: int):
        super().__init__(daemon=True)
        self.sock = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
        self.sock.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, 8 * 2**20)
        self.sock.bind(("127.0.0.1", port))
        self.sock.settimeout(0.2)
        self.samples: dict[int, int] = defaultdict(int)
        self.last = time.monotonic()
        self.stop = threading.Event()

    def run(self) -> None:
        while not self.stop.is_set():
            try:
                data = self.sock.recv(65535)
            except socket.timeout:
                continue
            pkt = rtp_packet.parse(data)
            if pkt is not None:
                self.samples[pkt.ssrc] += len(pkt.payload) // 2
                self.last = time.monotonic()


def run(n: int, seconds: float, payload: list[bytes], model: str | None, hold: bool = False) -> str:
    port_in, port_out = _free_port(), _free_port()
    rx = _Receiver(port_out)
    rx.start()
    cmd = [sys.executable, "-m", "nenv", "relay", "--listen", f"127.0.0.1:{port_in}", "--to", f"127.0.0.1:{port_out}",
           "--max-streams", str(n + 8), "--idle-timeout", "1.0", "--method", "neural"]
    if model:
        cmd += ["--model", model]
    if hold:
        cmd.append("--hold-freed-memory")
    env = {**os.environ, "OMP_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1"}
    proc = subprocess.Popen(cmd, stderr=subprocess.PIPE, text=True, env=env)
    try:
        proc.stderr.readline()  # "relaying RTP from ...": the socket is bound
        # keep reading: the per-stream report at the end outgrows a pipe's buffer with a few hundred streams
        err: list[str] = []
        reader = threading.Thread(target=lambda: err.append(proc.stderr.read()), daemon=True)
        reader.start()
        tx = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
        tx.setsockopt(socket.SOL_SOCKET, socket.SO_SNDBUF, 8 * 2**20)
        n_packets = int(seconds * 50)
        sent = np.zeros(n, dtype=np.int64)
        half_backlog = None
        t0 = time.monotonic() + 0.2
        cpu0 = _cpu_seconds(proc.pid)
        for k in range(n_packets):
            for i in range(n):
                due = t0 + 0.02 * (k + i / n)
                wait = due - time.monotonic()
                if wait > 0:
                    time.sleep(wait)
                tx.sendto(rtp_packet.build(payload_type=0, seq=k, timestamp=PACKET * k, ssrc=1000 + i, payload=payload[(k + 7 * i) % len(payload)]), ("127.0.0.1", port_in))
                sent[i] += PACKET
            if k == n_packets // 2:
                half_backlog = _backlog_ms(sent, rx)
        wall = time.monotonic() - t0
        cpu = _cpu_seconds(proc.pid) - cpu0
        end_backlog = _backlog_ms(sent, rx)
        while time.monotonic() - rx.last < 2.5:  # idle streams are flushed after 1 s
            time.sleep(0.2)
        got = sum(rx.samples.values())
        complete = got / (2 * (sent.sum() + n * rtp.TAIL_SAMPLES))  # each stream ends with its tail pushed out by TAIL_SAMPLES of silence
    finally:
        proc.terminate()
        proc.wait(timeout=30)
        rx.stop.set()
    reader.join(timeout=10)
    load = next((line for line in "".join(err).splitlines() if line.startswith("relay load:")), "relay load: not reported")
    return (f"{n:4d} streams: relay CPU {100 * cpu / wall:5.1f}% of one core; backlog half-way {half_backlog:6.0f} ms, "
            f"at the end {end_backlog:6.0f} ms (mean over streams); output complete {100 * complete:6.2f}%\n      {load}")


def _backlog_ms(sent: np.ndarray, rx: _Receiver) -> float:
    """Mean over streams of output still owed, in ms (the relay sends each stream under its own new SSRC)."""
    got = sum(rx.samples.values())
    return float(2 * sent.sum() - got) / sent.size / 16.0  # 16 samples per ms at 16 kHz


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--streams", type=int, nargs="+", default=[25, 50, 100])
    ap.add_argument("--seconds", type=float, default=10.0)
    ap.add_argument("--model", default=None)
    ap.add_argument("--hold-freed-memory", action="store_true", help="start the relay with --hold-freed-memory")
    args = ap.parse_args()
    ref = np.concatenate([prepare_reference(DATA / n) for n in ("arctic_a0007.wav", "arctic_a0009.wav")])
    codes = g711.encode(channel.telephone(ref, sr=16000, law="mulaw"), law="mulaw")
    payload = [codes[s : s + PACKET].astype(np.uint8).tobytes() for s in range(0, codes.size - PACKET, PACKET)]
    print(f"relay on loopback, neural, PCMU 20 ms packets paced in real time for {args.seconds:.0f} s per run" + (", relay started with --hold-freed-memory" if args.hold_freed_memory else ""))
    for n in args.streams:
        print(run(n, args.seconds, payload, args.model, args.hold_freed_memory), flush=True)


if __name__ == "__main__":
    main()
