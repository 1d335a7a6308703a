"""Commands for live audio: ``nenv stream`` (stdin/stdout) and ``nenv relay`` (RTP)."""

from __future__ import annotations

import errno
import os
import select
import sys
from pathlib import Path
from typing import Annotated, Optional

import typer

from nenv.words import count
from nenv.serve.streamfile import watch
from nenv.cli.app import Excitation, LowBandOpt, InputFormat, LiveMethod, _default_method, _guarded, _kernels_ready, _say, app
from nenv.errors import InputError, OutputError

@app.command()
@_guarded
def stream(
    input_format: Annotated[InputFormat, typer.Option("--input-format", help="stdin encoding at 8 kHz: s16le (16-bit little-endian PCM), mulaw (PCMU bytes) or alaw (PCMA bytes).")] = "s16le",
    method: Annotated[Optional[LiveMethod], typer.Option(help="System (default: neural when a model is available).")] = None,
    model: Annotated[Optional[Path], typer.Option(help="Model folder (default: $NENV_MODEL, else the shipped model).")] = None,
    excitation: Annotated[Excitation, typer.Option(help="Excitation extension for source-filter systems.")] = "rectify",
    low_band: LowBandOpt = False,
    record: Annotated[Optional[Path], typer.Option(help="Append the guard's record to this JSON Lines file while the call runs (neural only).")] = None,
    call_id: Annotated[str, typer.Option(help="Call id stored with the record.")] = "stdin",
    group: Annotated[Optional[str], typer.Option(help="Speaker group or codec label stored with the record.")] = None,
) -> None:
    """Extend a live call: 8 kHz audio on stdin, 16 kHz s16le on stdout, unbuffered.

    Ends cleanly at end of input or on SIGTERM/SIGINT, writing the last samples first.
    """
    _kernels_ready()
    import signal as sig

    import numpy as np

    from nenv.dsp import g711
    from nenv.chain import pipeline
    from nenv.media.audio import to_int16
    from nenv.serve.runtime import CallEngine
    from nenv.chain.systems import band_note

    if sys.stdout.isatty():
        raise InputError("standard output is a terminal: stream writes raw 16-bit audio; redirect it to a file or a pipe (nenv stream < call.raw > call-wb.raw)")
    method = method or _default_method(model)
    if method not in pipeline.SYSTEMS or method in pipeline.REFERENCE_SYSTEMS:
        raise InputError(f"--method {method} cannot stream: choose neural, codebook, imaging or unextended")
    pipeline.check_low_band(method, low_band)  # before anything starts (the relay makes its systems per stream)
    if method in pipeline.MODEL_SYSTEMS:
        model = pipeline.load_model(model, flush_denormals=True)  # this process is ours: flush denormals
    engine = CallEngine(system=pipeline.make_system(method, model=model, excitation=excitation, low_band=low_band))
    if getattr(engine.system, "band_trim_db", 0.0):
        _say(f"nenv: note: {band_note(engine.system.band_trim_db, given=False)}")
    # a record that cannot be written (a full disk) must not cut the call: recording stops, the audio goes on
    tally, writer = watch(engine.system, record, source=call_id, group=group, n_hops=2**62, keep_going=True, on_failure=lambda m: _say(f"nenv: {m}"))
    out = sys.stdout.buffer
    fd = sys.stdin.fileno()

    # SIGTERM/SIGINT set a flag that the loop checks between blocks: a stop never cuts a block in
    # half, and further signals while the tail is flushed are absorbed. The signal also wakes the
    # wait for input (a byte on a wake-up pipe), so a quiet input does not delay the stop.
    stopping: list[int] = []
    wake_r, wake_w = os.pipe()
    os.set_blocking(wake_w, False)
    old = {s: sig.signal(s, lambda signum, frame: stopping.append(signum)) for s in (sig.SIGTERM, sig.SIGINT)}
    old_wake = sig.set_wakeup_fd(wake_w)
    try:
        leftover = b""
        reader_gone = False  # stdout's reader closed the pipe: nothing more can be delivered
        try:
            while not stopping:
                ready, _, _ = select.select([fd, wake_r], [], [])
                if stopping or fd not in ready:
                    continue
                data = os.read(fd, 4096)
                if not data:
                    break
                if engine.samples_in == 0 and not leftover and data[:4] == b"RIFF" and data[8:12] == b"WAVE":
                    raise InputError("standard input is a WAV file, header and all: extend a file with 'nenv extend CALL.wav CALL-WB.wav', or stream its raw samples (for example: sox CALL.wav -t raw - | nenv stream)")
                if input_format == "s16le":
                    data = leftover + data
                    n = len(data) // 2 * 2
                    leftover = data[n:]
                    x = np.frombuffer(data[:n], dtype="<i2").astype(np.float64) / 32768.0
                else:
                    x = g711.decode(np.frombuffer(data, dtype=np.uint8), law=input_format)
                y = engine.feed(x)
                if y.size:
                    out.write(to_int16(y).astype("<i2").tobytes())
                    out.flush()
        except BrokenPipeError:
            reader_gone = True
            os.dup2(os.open(os.devnull, os.O_WRONLY), out.fileno())  # so that exiting does not fail on the dead pipe again
        # the handlers stay until the tail is out: a second signal during the flush is absorbed
        if leftover:  # s16le input that ended inside a sample: say so rather than drop it silently
            _say("note: the input ended with half a 16-bit sample (one odd byte); it was ignored")
        if tally is not None:
            tally.limit = -(-engine.samples_in // 80)  # the tail padding is not part of the call
        y = engine.flush()
        if y.size and not reader_gone:
            try:
                out.write(to_int16(y).astype("<i2").tobytes())
                out.flush()
            except BrokenPipeError:
                reader_gone = True
                os.dup2(os.open(os.devnull, os.O_WRONLY), out.fileno())
        if writer is not None:  # the guard's record of the call is completed even when its output was cut short
            writer.summary(source=call_id, group=group, tally=tally, seconds=engine.samples_in / 8000)
            writer.close()
        _say(f"stream ended: {engine.samples_in / 8000:.2f} s in, {engine.samples_out / 16000:.2f} s out, {count(engine.limited, 'sample')} limited, {count(engine.bad_samples, 'bad sample')}")
        if tally is not None and tally.hops:
            _say(tally.line())
    finally:
        sig.set_wakeup_fd(old_wake)
        os.close(wake_r)
        os.close(wake_w)
        # after a stop the process is on its way out: further signals are ignored to the end (a
        # supervisor's second SIGTERM must not turn a clean stop into status 143; the interpreter
        # resets Python-level handlers while it shuts down, an ignored signal stays ignored)
        for s, h in old.items():
            sig.signal(s, sig.SIG_IGN if stopping else h)
    if reader_gone:
        raise OutputError("standard output was closed by its reader before the call ended: the rest of the extended audio was not delivered")
    if writer is not None and writer.incomplete():
        raise OutputError(writer.incomplete())


def _hostport(text: str, what: str) -> tuple[str, int]:
    """HOST:PORT, with an IPv6 address in brackets ([::1]:5004)."""
    host, sep, port = text.rpartition(":")
    if host.startswith("[") and host.endswith("]"):
        host = host[1:-1]
    elif ":" in host:
        raise InputError(f"{what} {text!r}: write an IPv6 address in brackets, e.g. [::1]:5004")
    if not sep or not port.isdigit() or not 0 <= int(port) <= 65535:
        raise InputError(f"{what} {text!r} must look like HOST:PORT, e.g. 127.0.0.1:5004 or [::1]:5004")
    return host or "127.0.0.1", int(port)


@app.command()
@_guarded
def relay(
    to: Annotated[str, typer.Option("--to", help="Where to send the wideband RTP (L16/16000), HOST:PORT.")],
    listen: Annotated[str, typer.Option(help="Where to receive PCMU/PCMA RTP, HOST:PORT. Loopback unless you say otherwise.")] = "127.0.0.1:5004",
    allow: Annotated[list[str], typer.Option(help="Accept packets only from this source address (repeatable). Default: any.")] = [],
    payload_type: Annotated[int, typer.Option(help="Dynamic RTP payload type of the output (96-127).")] = 96,
    max_streams: Annotated[int, typer.Option(min=1, help="Most concurrent streams (SSRCs); packets of further streams are dropped and counted.")] = 64,
    idle_timeout: Annotated[float, typer.Option(help="Seconds without packets after which a stream is flushed and closed.")] = 2.0,
    method: Annotated[Optional[LiveMethod], typer.Option(help="System (default: neural when a model is available).")] = None,
    model: Annotated[Optional[Path], typer.Option(help="Model folder (default: $NENV_MODEL, else the shipped model).")] = None,
    step_ms: Annotated[float, typer.Option(min=5.0, max=100.0, help="Neural method: all streams are extended together every this many ms (a packet waits at most one step; 10 halves the wait for more CPU per call).")] = 20.0,
    symmetric: Annotated[bool, typer.Option("--symmetric", help="Send from the listening port (symmetric RTP, which many gateways and NATs expect).")] = False,
    shared_port: Annotated[bool, typer.Option("--shared-port", help="Let other relays started with this option listen on the same port (one per core): the system gives each sender's packets to one of them.")] = False,
    low_band: LowBandOpt = False,
    hold_freed_memory: Annotated[bool, typer.Option("--hold-freed-memory", help="Let this process keep the memory a batched step frees (glibc raises its own heap thresholds once): a fifth less time per step with many streams.")] = False,
    record: Annotated[Optional[Path], typer.Option(help="Append the guard's record to this JSON Lines file while the relay runs, each stream under its call id (neural only).")] = None,
    group: Annotated[Optional[str], typer.Option(help="Speaker group or codec label stored with the record.")] = None,
) -> None:
    """Relay RTP: PCMU/PCMA in (RFC 3551 types 0 and 8), L16 16 kHz out, one call per SSRC. Stops on SIGTERM/Ctrl-C."""
    _kernels_ready()
    if hold_freed_memory:
        from nenv.serve.memory import hold_freed_memory as hold

        hold()
    import signal as sig

    from nenv.chain import pipeline
    from nenv.serve import rtp
    from nenv.serve.load import LATE_AFTER_STEPS

    method = method or _default_method(model)
    if method not in pipeline.SYSTEMS or method in pipeline.REFERENCE_SYSTEMS:
        raise InputError(f"--method {method} cannot stream: choose neural, codebook, imaging or unextended")
    pipeline.check_low_band(method, low_band)  # before anything starts (the relay makes its systems per stream)
    if record is not None and method != "neural":
        raise InputError("--record needs the neural method (only the guard's decisions are recorded)")
    if not 96 <= payload_type <= 127:
        raise InputError(f"--payload-type {payload_type}: dynamic payload types are 96-127 (RFC 3551)")
    ck = pipeline.load_model(model, flush_denormals=True) if method in pipeline.MODEL_SYSTEMS else None
    try:
        # the neural system runs every stream in one batched engine (one pass per hop for all calls)
        r = rtp.Relay(lambda: pipeline.make_system(method, model=ck, low_band=low_band), listen=_hostport(listen, "--listen"), send_to=_hostport(to, "--to"),
                      payload_type_out=payload_type, allowed_sources=list(allow) or None, max_streams=max_streams, idle_timeout_s=idle_timeout,
                      batch_model=ck if method == "neural" else None, tick_s=step_ms / 1000.0, symmetric=symmetric, shared_port=shared_port, low_band=low_band,
                      notice=lambda text: _say(f"relay: {text}"), record=record, group=group)
    except OSError as e:
        shared = " (relays meant to share a port must all be started with --shared-port)" if e.errno == errno.EADDRINUSE else ""
        raise InputError(f"cannot listen on {listen}: {e.strerror or e}{shared}") from e
    host = f"[{r.address[0]}]" if ":" in r.address[0] else r.address[0]
    _say(f"relaying RTP from {host}:{r.address[1]} to {to} (method={method}{' with the low band' if low_band else ''}{f', band {ck.band_trim_db:+g} dB by the model folder' if ck is not None and ck.band_trim_db else ''}, output payload type {payload_type}{', symmetric' if symmetric else ''}{', port shared' if shared_port else ''}); stop with Ctrl-C")
    if r.receive_buffer < rtp.RECEIVE_BUFFER_BYTES:
        _say(f"note: the system allows a receive buffer of only {r.receive_buffer // 1024} KiB (net.core.rmem_max); under load, packets that arrive "
             f"during a step may be dropped: raise net.core.rmem_max to {rtp.RECEIVE_BUFFER_BYTES} or more")

    # SIGTERM/SIGINT ask the relay to stop: it finishes the datagram at hand, flushes every stream and
    # closes; a stop never lands between sending a packet and counting it, and further signals
    # during the flush are absorbed
    old = {s_: sig.signal(s_, lambda signum, frame: r.request_stop()) for s_ in (sig.SIGTERM, sig.SIGINT)}
    try:
        r.serve()
    finally:
        for s_, h in old.items():  # after a stop, further signals are ignored until the process has exited
            sig.signal(s_, sig.SIG_IGN if r.stop_requested else h)
    for ssrc, c in r.closed.items():
        _say(f"stream {ssrc:08x}: {count(c.packets, 'packet')} in, {c.packets_out} out, {c.lost_packets} lost ({count(c.filled_samples, 'sample')} filled), {c.late_or_duplicate} late or duplicate, {count(c.silence_filled, 'sample')} of suppressed silence filled, {count(c.timing_restarts, 'timing restart')}, {count(c.resyncs, 'sender restart')}, {count(c.source_changes, 'source address change')}, {count(c.guard_fallbacks, 'guard fallback')}")
    _say(f"relay: {count(r.counters.streams_opened, 'stream')}, {r.counters.malformed} malformed, {r.counters.oversized} oversized, {r.counters.wrong_payload_type} wrong payload type, {r.counters.not_allowed} not allowed, {r.counters.over_stream_limit} over the stream limit, {r.counters.ssrc_conflicts} from a second sender of an SSRC in use, {count(r.counters.goodbyes, 'stream')} ended by RTCP BYE, {count(r.counters.send_errors, 'packet')} the system would not send")
    drops = "unknown" if r.counters.system_drops is None else r.counters.system_drops
    _say(f"relay load: the longest round {r.counters.longest_round_ms:.0f} ms, {r.counters.late_rounds} longer than {LATE_AFTER_STEPS} steps of {step_ms:g} ms; "
         f"datagrams the system dropped unread, its socket buffer full: {drops}")
    if r.records is not None and r.records.writer.incomplete():
        raise OutputError(r.records.writer.incomplete())
