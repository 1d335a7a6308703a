"""Commands on files: degrade, extend, evaluate, measures, demo, version, audit (each docstring is its help)."""

from __future__ import annotations

import os
import time
from importlib import resources
from pathlib import Path
from typing import Annotated, Optional

import typer

from nenv.words import count
from nenv import __version__
from nenv.cli.app import DEMO_CLIP, BandTrimOpt, LowBandOpt, SNR_RANGE_DB, AudioFormat, ChannelOpt, Excitation, Law, LawChoice, Method, MethodChoice, MixOpt, _default_method, _guarded, _kernels_ready, _progress, _say, _unknown_clips, app
from nenv.errors import InputError

JobsOpt = Annotated[int, typer.Option(min=0, help="Clips scored in this many processes (0 = one per core). Each needs its own memory (under 0.8 GB for a 3-minute clip); on 2 cores, 2 processes took 11-16% less time than one.")]


@app.command()
@_guarded
def degrade(
    wideband: Annotated[Path, typer.Argument(help="Wideband speech (16 kHz or more; wav, flac, ogg, mp3, ...).")],
    narrowband: Annotated[Path, typer.Argument(help="Where to write the 8 kHz telephone-band result (.wav, .flac).")],
    law: Annotated[Law, typer.Option(help="G.711 companding: mulaw (PCMU), alaw (PCMA) or none.")] = "mulaw",
    level_dbov: Annotated[float, typer.Option(help="Active speech level of the result in dBov (0 dBov = full-scale square wave).")] = -26.0,
    snr_db: Annotated[Optional[float], typer.Option(help="Add white noise at this SNR in dB before the channel.")] = None,
    seed: Annotated[int, typer.Option(help="Seed of the noise generator.")] = 0,
    channel: ChannelOpt = None,
    mix: MixOpt = False,
) -> None:
    """Simulate a telephone channel: 300-3400 Hz band-pass, 8 kHz, optional G.711 and noise."""
    import numpy as np

    from nenv.media import audio
    from nenv.dsp import g711
    from nenv.dsp import channel as chan
    from nenv.media.files import check_distinct, check_output

    out = check_output(narrowband, suffixes=(".wav", ".flac"))
    check_distinct(out, what="the output", others={"the input": wideband})
    a = audio.load(wideband, channel=channel, mix=mix)
    if audio.is_silent(a.y):
        raise InputError(f"'{wideband}' is digital silence (every sample is zero)")
    if a.sr < 16000:
        raise InputError(f"'{wideband}' is sampled at {a.sr} Hz: degrade needs wideband input (16 kHz or more)")
    if snr_db is not None and not SNR_RANGE_DB[0] <= snr_db <= SNR_RANGE_DB[1]:
        raise InputError(f"--snr-db {snr_db:g} is out of range: choose {SNR_RANGE_DB[0]:g} to {SNR_RANGE_DB[1]:g} dB (telephone lines: 20-50 dB)")
    nb = chan.telephone(a.y, sr=a.sr, level_dbov=level_dbov, snr_db=snr_db, seed=seed)  # linear: clipping is counted before coding
    ceiling = 32767 / 32768 if law == "none" else float(np.abs(g711.decode(np.arange(256, dtype=np.uint8), law=law)).max())
    clipped = int(np.count_nonzero(np.abs(nb) > ceiling))
    if law != "none":
        nb = g711.compand(nb, law=law)  # the channel's last step, as chan.telephone(..., law=law) does it
    audio.write(out, nb, sr=8000)
    _say(f"wrote {out} (8 kHz, {nb.size / 8000:.2f} s, law={law}, {level_dbov:g} dBov{'' if snr_db is None else f', SNR {snr_db:g} dB'})")
    if clipped:
        _say(f"nenv: warning: {count(clipped, 'sample')} ({100 * clipped / nb.size:.2f}%) reached full scale and were clipped: lower --level-dbov (speech on telephone lines sits near -26 dBov)")


@app.command()
@_guarded
def extend(
    inputs: Annotated[list[Path], typer.Argument(help="8 kHz telephone speech: one file, or folders (searched recursively), files and lists (.txt, one path per line).", show_default=False, readable=False)],
    output: Annotated[Path, typer.Argument(help="The 16 kHz result (.wav, .flac) for one input file; a folder (mirroring the input layout) otherwise.", show_default=False)],
    method: Annotated[Optional[Method], typer.Option(help="System (default: neural when a model is available); oracle and true-band are for evaluation only and need --reference.")] = None,
    model: Annotated[Optional[Path], typer.Option(help="Model folder made by 'nenv train' (default: $NENV_MODEL, else the shipped model).")] = None,
    excitation: Annotated[Excitation, typer.Option(help="Excitation extension for source-filter systems.")] = "rectify",
    low_band: LowBandOpt = False,
    band_trim: BandTrimOpt = None,
    reference: Annotated[Optional[Path], typer.Option(help="Wideband original, for --method oracle or true-band only (one file).")] = None,
    figure: Annotated[Optional[Path], typer.Option(help="Also write a spectrogram figure (.png, .svg, .pdf): input vs output (one file).")] = None,
    resample: Annotated[bool, typer.Option("--resample", help="Accept input at another rate (4-192 kHz) and resample it to 8 kHz.")] = False,
    channel: ChannelOpt = None,
    mix: MixOpt = False,
    record: Annotated[Optional[Path], typer.Option(help="Append the guard's record (rejected hops, summary) to this JSON Lines file (neural only).")] = None,
    group: Annotated[Optional[str], typer.Option(help="Speaker group or codec label stored with the record.")] = None,
    jobs: Annotated[int, typer.Option(min=0, help="Folders and lists: files extended in parallel (0 = one per core).")] = 0,
    overwrite: Annotated[bool, typer.Option("--overwrite", help="Extend again into outputs that already exist (default: skip them, for one file as for folders).")] = False,
    format: Annotated[AudioFormat, typer.Option("--format", help="Folders and lists: output format.")] = "wav",
    scheduler: Annotated[Optional[str], typer.Option(help="Folders and lists: run on this dask.distributed scheduler (e.g. tcp://10.0.0.5:8786) instead of local processes.")] = None,
) -> None:
    """Extend 8 kHz telephone speech to 16 kHz wideband speech: one file, or whole folders in parallel."""
    _kernels_ready()
    from nenv.chain.systems import check_band_trim, check_low_band
    from nenv.serve import batch, streamfile

    method = method or _default_method(model)
    check_low_band(method, low_band)  # before any file is read
    check_band_trim(method, band_trim)
    opts = streamfile.Options(method=method, model=None if model is None else str(model), excitation=excitation, low_band=low_band, band_trim_db=band_trim, resample=resample, channel=channel, mix=mix, group=group)
    if batch.is_batch(inputs):
        if reference is not None or figure is not None:
            raise InputError("--reference and --figure work on one input file at a time")
        _extend_many(inputs, output, opts, jobs=jobs, overwrite=overwrite, suffix="." + format.lower(), scheduler=scheduler, record=record)
    else:
        _extend_one(inputs[0], output, opts, reference=reference, figure=figure, record=record, overwrite=overwrite)


RATE_MIN_S = 30.0  # seconds: a batch shorter than this reports no hourly rates (extrapolated, they mislead)
FIGURE_MAX_S = 600.0  # a spectrogram of more than 10 minutes is unreadable (and costly)


def _extend_one(src: Path, dst: Path, opts, *, reference=None, figure=None, record=None, overwrite: bool = False) -> None:
    from nenv.media import audio
    from nenv.serve import streamfile
    from nenv.report.figures import FIGURE_SUFFIXES, spectrogram_grid
    from nenv.media.files import check_distinct, check_output

    check_output(dst, suffixes=streamfile.OUTPUT_SUFFIXES)
    check_distinct(dst, what="the output", others={"the input": src, "the reference": reference})
    if dst.exists() and not overwrite:  # the batch rule, for one file too: finished outputs are kept
        _say(f"skipped: '{dst}' exists (pass --overwrite to extend it again)")
        return
    if figure is not None:
        check_output(figure, suffixes=FIGURE_SUFFIXES)
        check_distinct(figure, what="the figure", others={"the input": src, "the reference": reference, "the output": dst, "the record": record})
    with _progress() as bar:
        task = bar.add_task(f"extending {src.name}", total=None)
        res = streamfile.extend_file(src, dst, opts, reference=reference, record=record, on_progress=lambda done, total: bar.update(task, completed=done, total=total))
    for note in res.notes:
        _say(f"nenv: note: {note}")
    if record is not None:
        _say(f"appended the guard record to {record}")
    length = f"{res.seconds:.2f} s" if res.seconds >= 1 else f"{1000 * res.seconds:.1f} ms"
    speed = f", {res.seconds / max(res.wall_s, 1e-9):.0f}x real time" if res.seconds >= 1 else ""  # under a second the start-up is all there is to time
    _say(f"wrote {dst} (16 kHz, {length}, method={opts.method}{speed})")
    if res.limited:
        _say(f"nenv: warning: {count(res.limited, 'sample')} of the output (telephone band plus added band) exceeded -0.1 dBFS and were limited: lower the input level; if the input peaks well below full scale, the added band caused it (try --method unextended, or another model)")
    if res.hops:
        from nenv.chain.guard import summary_line

        _say(summary_line(res.hops, res.rejected, res.by_reason))
    if figure is not None:
        if res.seconds > FIGURE_MAX_S:
            _say(f"nenv: note: no figure: the input is longer than {FIGURE_MAX_S / 60:.0f} min")
            return
        x = audio.load(src, channel=opts.channel, mix=opts.mix)
        up = audio.resample(x.y, orig_sr=x.sr, target_sr=16000)
        spectrogram_grid([[("input (shown at 16 kHz)", up), (f"output: {opts.method}", audio.load(dst).y)]], figure, title=src.name)
        _say(f"wrote {figure}")


def _extend_many(inputs: list[Path], out: Path, opts, *, jobs: int, overwrite: bool, suffix: str, scheduler: Optional[str], record: Optional[Path]) -> None:
    from nenv.serve import batch, streamfile
    from nenv.media.files import output_folder, write_text

    if (out.exists() and not out.is_dir()) or (not out.exists() and out.suffix.lower() in streamfile.OUTPUT_SUFFIXES):
        raise InputError(f"'{out}' looks like a file: with folders, lists or several inputs the output must be a folder")
    work = batch.plan(inputs, out, suffix=suffix)
    batch.check_options(opts)
    if record is not None:
        batch.check_record(record, work)
    output_folder(out, what="the output folder")
    n_cpu = os.cpu_count() or 1
    where = f"scheduler {scheduler}" if scheduler else f"{min(jobs or n_cpu, len(work))} process(es)"
    _say(f"extending {count(len(work), 'file')} into {out} on {where}")
    finished: list = []
    t0 = time.perf_counter()
    with _progress() as bar:
        task = bar.add_task("extending", total=len(work))

        def done(r):
            finished.append(r)
            bar.advance(task)
            if r.status == "failed":
                bar.console.print(f"nenv: failed: {r.source}: {r.message}") if bar.console.is_terminal else _say(f"nenv: failed: {r.source}: {r.message}")

        try:
            summ = batch.run(work, opts, workers=jobs, scheduler=scheduler, overwrite=overwrite, record=record, on_result=done)
        except KeyboardInterrupt:
            # say what is finished (those outputs are whole and stay); rerun the command to go on
            partial = batch.Summary(finished, time.perf_counter() - t0)
            write_text(out / batch.REPORT_NAME, partial.to_csv())
            _say(f"nenv: stopped after {count(partial.count('done'), 'file')} done and {partial.count('skipped')} skipped of {len(work)}; "
                 f"rerun the same command to finish (finished outputs are skipped); see {out / batch.REPORT_NAME}")
            raise
    write_text(out / batch.REPORT_NAME, summ.to_csv())
    files_h, audio_h = summ.throughput()
    rate = f" = {files_h:.0f} files/h, {audio_h:.1f} h of audio per hour" if summ.wall_s >= RATE_MIN_S else ""  # a few seconds say little about an hour
    typer.echo(
        f"done {summ.count('done')}, skipped {summ.count('skipped')} (output exists), failed {summ.count('failed')}; "
        f"{summ.audio_s / 3600:.3f} h of audio in {summ.wall_s:.1f} s{rate}"
    )
    _say(f"wrote {out / batch.REPORT_NAME}")
    if summ.count("failed"):
        raise typer.Exit(1)


@app.command()
@_guarded
def evaluate(
    references: Annotated[list[Path], typer.Argument(help="Wideband reference recordings (16 kHz or more).")],
    out: Annotated[Path, typer.Option(help="Folder for table.csv, table.md and spectrograms.png (created if missing).")],
    law: Annotated[list[LawChoice], typer.Option(help="Channel G.711 law; repeat to compare several.")] = [LawChoice.none],
    method: Annotated[list[MethodChoice], typer.Option(help="Systems to compare; repeat. Default: every available system.")] = [],
    excitation: Annotated[Excitation, typer.Option(help="Excitation extension for source-filter systems.")] = "rectify",
    model: Annotated[Optional[Path], typer.Option(help="Model folder for the neural and codebook systems (default: the shipped model, if any).")] = None,
    low_band: LowBandOpt = False,
    band_trim: BandTrimOpt = None,
    groups: Annotated[Optional[Path], typer.Option(help="CSV with the columns clip and group (e.g. female/male; clip = a reference's file name without suffix): adds a mean per group.")] = None,
    compare_low_band: Annotated[bool, typer.Option("--compare-low-band", help="Run each system that can add the 50-300 Hz band twice, without and with it, side by side.")] = False,
    jobs: JobsOpt = 1,
) -> None:
    """Score every system against wideband references passed through the telephone channel."""
    _kernels_ready()
    from nenv.report import evaluate as ev, versus
    from nenv.report.figures import spectrogram_grid, versus_grid
    from nenv.media.files import output_folder, write_text

    output_folder(out, create=False)
    group_table = ev.read_groups(groups) if groups is not None else None
    law = [lw.value for lw in law]
    if method:
        systems = tuple(m.value for m in method)
    elif model is not None or _default_method(None) == "neural":
        systems = ev.ALL_SYSTEMS
    else:
        systems = ev.DEFAULT_SYSTEMS
    if low_band and compare_low_band:
        raise InputError("--low-band and --compare-low-band exclude each other: --compare-low-band already runs with and without it")
    low = "both" if compare_low_band else low_band
    with _progress() as bar:
        task = bar.add_task("evaluating", total=len(references) * len(law) * len(ev.variants(systems, low)))
        rows, clips = ev.run(references, systems=systems, laws=law, excitation=excitation, model=model, on_step=lambda s: bar.advance(task), low_band=low, workers=jobs, band_trim_db=band_trim)
    table = rows + ev.means(rows, group_table)
    _unknown_clips({r.clip for r in rows}, group_table, groups)
    output_folder(out)
    md = ev.to_markdown(table)
    blanks = ev.blank_notes(rows) + ev.trim_notes(systems, band_trim, model)
    named = list(dict.fromkeys(r.system for r in rows))
    heads = [h for lw in law for h in versus.compare([(r.system, r.clip, r.scores) for r in rows if r.law == lw], versus.pairs_to_compare(named), group_table, channel=lw if len(law) > 1 else "")]
    vs_md = versus.to_markdown(heads) if heads else ""
    write_text(out / "table.csv", ev.to_csv(table))
    if heads:
        write_text(out / "versus.csv", versus.to_csv(heads))
        for lw in law:  # one figure per channel law (the first keeps the plain name)
            suffix = "" if lw == law[0] else f"-{lw}"
            versus_grid([(r.system, r.clip, r.scores) for r in rows if r.law == lw], versus.pairs_to_compare(named), out / f"versus{suffix}.png", groups=group_table)
    write_text(out / "table.md", md + "\n" + ev.MEASURES_NOTE + "".join(f"\nNote: {b}.\n" for b in blanks) + (f"\n{vs_md}\n{versus.NOTE}" if heads else ""))
    panels = [[("reference", c.reference)] + list(c.outputs.items()) for c in clips[:4]]
    spectrogram_grid(panels, out / "spectrograms.png", title="  |  ".join(f"{c.name} ({c.law})" for c in clips[:4]))
    _show([md, ev.MEASURES_NOTE], vs_md, blanks, versus.summary(heads))
    _say(f"wrote {out / 'table.csv'}, {out / 'table.md'}" + (f", {out / 'versus.csv'}, {out / 'versus.png'}" if heads else "") + f", {out / 'spectrograms.png'}")


@app.command()
@_guarded
def measures(
    outputs: Annotated[list[Path], typer.Argument(help="Recordings to score (16 kHz; an 8 kHz file is scored as the unextended input): files, or folders whose files pair with a reference folder's by relative path.", show_default=False)],
    reference: Annotated[Path, typer.Option(help="The wideband original (16 kHz or more): one file for every output, or a folder of them.", show_default=False)],
    out: Annotated[Optional[Path], typer.Option(help="Also write table.csv and table.md to this folder (created if missing).")] = None,
    groups: Annotated[Optional[Path], typer.Option(help="CSV with the columns clip and group (e.g. female/male): adds a mean per group.")] = None,
    max_offset_s: Annotated[float, typer.Option(min=0.01, max=60.0, help="Search an output's offset against its reference within this many seconds either way.")] = 2.0,
    channel: Annotated[Optional[int], typer.Option("--channel", min=0, help="Channel of multichannel files to use (0 = first); mono files are read as they are.")] = None,
    mix: Annotated[bool, typer.Option("--mix", help="Average the channels of multichannel files.")] = False,
    baseline: Annotated[Optional[Path], typer.Option(help="The output (as named here) that holds no added band, to compare the others with head to head; default: the one 8 kHz output, if there is one.")] = None,
    jobs: JobsOpt = 1,
) -> None:
    """Score recordings you already have (from nenv or any other system) against wideband originals, after aligning them in time and level."""
    from nenv.report import evaluate as ev, pairs, versus
    from nenv.media.files import output_folder, write_text

    if out is not None:
        output_folder(out, create=False)
    group_table = ev.read_groups(groups) if groups is not None else None
    work, notes = pairs.plan(outputs, reference)
    if baseline is not None and str(baseline) not in {p.system for p in work}:
        names = list(dict.fromkeys(p.system for p in work))
        raise InputError(f"--baseline {baseline} is not one of the outputs scored ({', '.join(names[:4])}{', ...' if len(names) > 4 else ''}): name a file or folder as given")
    for n in notes:
        _say(f"nenv: note: {n}")
    with _progress() as bar:
        task = bar.add_task("scoring", total=len(work))
        rows = pairs.run(work, max_offset_s=max_offset_s, channel_index=channel, mix=mix, workers=jobs, on_step=lambda s: bar.advance(task))
    failed = [r for r in rows if r.error]
    for r in rows:
        for n in r.notes:
            _say(f"nenv: note: {r.pair.output}: {n}")
    for r in failed:
        _say(f"nenv: failed: {r.pair.output}: {r.error}")
    if len(failed) == len(rows):
        raise InputError("the output could not be scored" if len(rows) == 1 else f"none of the {len(rows)} outputs could be scored")
    avg = pairs.means(rows, group_table)
    _unknown_clips({r.pair.clip for r in rows if r.scores is not None}, group_table, groups)
    md = pairs.to_markdown(rows, avg)
    blanks = pairs.blank_notes(rows)
    # with the unextended input among the outputs (one 8 kHz output): every other output against it
    base = [str(baseline)] if baseline is not None else pairs.unextended_outputs(rows)
    named = list(dict.fromkeys(r.pair.system for r in rows if r.scores is not None))
    heads = versus.compare([(r.pair.system, r.pair.clip, r.scores) for r in rows if r.scores is not None], versus.pairs_to_compare(named, baseline=base[0], default=None), group_table) if len(base) == 1 else []
    vs_md = versus.to_markdown(heads) if heads else ""
    _show([md, pairs.ALIGN_NOTE, ev.MEASURES_NOTE], vs_md, blanks, versus.summary(heads, baseline=base[0] if base else versus.BASELINE))
    if out is not None:
        output_folder(out)
        write_text(out / "table.csv", pairs.to_csv(rows, avg, group_table))
        write_text(out / "table.md", md + "\n" + pairs.ALIGN_NOTE + "\n" + ev.MEASURES_NOTE + "".join(f"\nNote: {b}.\n" for b in blanks) + (f"\n{vs_md}\n{versus.NOTE}" if heads else ""))
        from nenv.report.figures import alignment_grid, versus_grid

        if heads:
            write_text(out / "versus.csv", versus.to_csv(heads))
            versus_grid([(r.pair.system, r.pair.clip, r.scores) for r in rows if r.scores is not None], versus.pairs_to_compare(named, baseline=base[0], default=None), out / "versus.png", groups=group_table)
        drawn = alignment_grid(rows, out / "alignment.png")
        wrote = [out / "table.csv", out / "table.md"] + ([out / "versus.csv", out / "versus.png"] if heads else [])
        _say(f"wrote {', '.join(map(str, wrote))}" + (f", {out / 'alignment.png'} ({count(drawn, 'output')} aligned with more than one offset and gain)" if drawn else ""))
    if failed:
        raise typer.Exit(1)


def _show(texts: list[str], head_to_head: str, blanks: list[str], verdicts: list[str]) -> None:
    """The tables and their notes on stdout (then the head-to-head table and its note, if any); the
    blank-value notes and one line per system against the baseline on stderr."""
    from nenv.report.versus import NOTE

    for t in texts + ([head_to_head, NOTE] if head_to_head else []):
        typer.echo(t)
    for b in blanks:
        _say(f"nenv: note: {b}")
    for line in verdicts:
        _say(f"nenv: {line}")


@app.command()
@_guarded
def demo(
    out: Annotated[Path, typer.Option(help="Folder for the demo output (created if missing).")] = Path("nenv-demo"),
) -> None:
    """Extend the bundled demo call (an invented order confirmation) and draw input vs output."""
    _kernels_ready()
    from nenv.serve import streamfile
    from nenv.media.files import output_folder

    output_folder(out)
    with resources.as_file(resources.files("nenv") / "data" / "demo" / DEMO_CLIP) as clip:
        _say(f"demo input: {clip} (8 kHz telephone speech coded with G.711 mu-law, stored decoded as 16-bit linear PCM; an invented scenario)")
        _extend_one(clip, out / "order_confirmation_16k.wav", streamfile.Options(method=_default_method(None)), figure=out / "order_confirmation.png")
    _say("listen at a moderate level: the added high band is estimated, not recorded")


@app.command()
def version() -> None:
    """Print nenv's version."""
    typer.echo(__version__)


@app.command()
@_guarded
def audit(
    records: Annotated[list[Path], typer.Argument(help="Guard record files (JSON Lines) from extend/stream --record.")],
    out: Annotated[Path, typer.Option(help="Folder for audit.html, by_source.csv and by_group.csv (created if missing).")],
    model: Annotated[Optional[Path], typer.Option(help="Re-run every recorded decision with this model folder (e.g. a retrained one).")] = None,
    manifest: Annotated[Optional[Path], typer.Option(help="Also write a training manifest (CSV: path,speaker,... with the rejected spans) of the sources behind the most rejections.")] = None,
    top: Annotated[int, typer.Option(min=1, help="How many sources the manifest lists.")] = 50,
) -> None:
    """Summarise where and why the guard rejected the network's envelope; write an HTML report."""
    from nenv.report import audit as au
    from nenv.chain import checkpoint
    from nenv.report import records as rc
    from nenv.media.files import output_folder, write_text

    output_folder(out, create=False)
    rec = rc.read(records)
    rows = au.table(rec)
    reruns = au.rerun(rec, checkpoint.load(model)) if model is not None else None
    output_folder(out)
    write_text(out / "by_source.csv", au.to_csv(rows))
    write_text(out / "by_group.csv", au.to_csv(au.totals(rows, key=lambda r: r.group or "(none)")))
    write_text(out / "audit.html", au.html_page(rec, rows, au.figures(rec, rows), reruns))
    typer.echo(au.to_text(rows + au.totals(rows)))
    groups = au.totals(rows, key=lambda r: r.group or "(none)")
    if any(r.group for r in rows):
        typer.echo("\nby group:\n" + au.to_text(groups))
    if reruns is not None:
        fixed = sum(1 for r in reruns if not r["new"])
        typer.echo(f"re-run with {model}: {fixed} of {len(reruns)} recorded rejections now pass the guard")
    if manifest is not None:
        from nenv.media.files import check_output

        write_text(check_output(manifest, suffixes=(".csv",)), au.manifest(rec, top=top))
        _say(f"wrote {manifest} (train with: nenv train --set manifest={manifest} ...; it needs wideband audio at those paths)")
    if rec.skipped_lines:
        _say(f"nenv: note: skipped {count(rec.skipped_lines, 'incomplete or unreadable line')}")
    _say(f"wrote {out / 'audit.html'}, {out / 'by_source.csv'}, {out / 'by_group.csv'}")
