"""Commands for training: ``nenv survey``, ``nenv train``, ``nenv export``."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Optional

import typer

from nenv.cli.app import _guarded, _progress, _say, app
from nenv.errors import InputError

RecipeOpt = Annotated[Optional[Path], typer.Option("--config", help="Training recipe (flat TOML, see configs/).")]
SchedulerOpt = Annotated[Optional[str], typer.Option(help="Run the survey and feature extraction on this dask.distributed scheduler (e.g. tcp://10.0.0.5:8786); its workers must see the corpus at the same path.")]
SetOpt = Annotated[list[str], typer.Option("--set", help="Override a recipe key: --set epochs=20 (repeatable).")]


@app.command()
@_guarded
def survey(
    corpus: Annotated[Path, typer.Argument(help="Folder of wideband recordings (wav, flac, ogg, mp3, aiff and other formats soundfile reads; 16 kHz or more; sub-folders = speakers).")],
    out: Annotated[Path, typer.Option(help="Folder for survey.csv and survey.png (created if missing).")],
    config: RecipeOpt = None,
    set_: SetOpt = [],
    scheduler: SchedulerOpt = None,
) -> None:
    """Check every file of a corpus and say which ones training would use, and why not."""
    from nenv.media.files import output_folder, write_text
    from nenv.train import corpus as corp
    from nenv.train import recipe as rcp

    recipe = rcp.load(config, overrides=list(set_))
    files = corp.scan(corpus, speaker_rule=recipe.speaker_rule, manifest=recipe.manifest)
    output_folder(out)
    with _progress() as bar:
        task = bar.add_task(f"surveying {len(files)} files", total=len(files))
        reports = corp.survey(files, recipe, workers=recipe.workers, scheduler=scheduler, on_done=lambda: bar.advance(task))
    write_text(out / "survey.csv", corp.reports_csv(reports))
    corp.survey_figure(reports, out / "survey.png")
    summ = corp.summary(reports)
    typer.echo(f"files: {summ['files']}  kept: {summ['kept_files']} ({summ['kept_hours'] * 60:.1f} min, {summ['kept_active_hours'] * 60:.1f} min active, {summ['speakers']} speakers)")
    for reason, n in sorted(summ["exclusion_reasons"].items(), key=lambda kv: -kv[1]):
        typer.echo(f"  excluded, {reason}: {n}")
    _say(f"wrote {out / 'survey.csv'}, {out / 'survey.png'}")


class _RichReporter:
    def __init__(self, bar):
        self.bar = bar
        self.task = None

    def stage(self, name, total=None):
        if self.task is not None:
            self.bar.remove_task(self.task)
        self.task = self.bar.add_task(name, total=total)
        return lambda: self.bar.advance(self.task)

    def log(self, msg):
        self.bar.console.print(msg) if self.bar.console.is_terminal else _say(msg)


@app.command()
@_guarded
def train(
    out: Annotated[Path, typer.Option(help="Model folder to create (replaced only with --force, and only once training succeeded).")],
    config: RecipeOpt = None,
    set_: SetOpt = [],
    cache: Annotated[Optional[Path], typer.Option(help="Feature cache folder (reused across runs). Default: none.")] = None,
    force: Annotated[bool, typer.Option("--force", help="Replace an existing model folder (and discard an interrupted run).")] = False,
    resume: Annotated[bool, typer.Option("--resume", help="Continue the interrupted run for --out from its last finished epoch (same recipe).")] = False,
    scheduler: SchedulerOpt = None,
) -> None:
    """Train an envelope network and its codebook on a wideband corpus, on CPU, and export it to ONNX."""
    from nenv.train import recipe as rcp

    recipe = rcp.load(config, overrides=list(set_))
    try:
        from nenv.train.loop import train as run
    except ImportError as e:
        raise InputError(f"training needs the train extra: pip install 'nenv[train]' ({e})") from e
    try:
        with _progress() as bar:
            res = run(recipe, out, cache_dir=str(cache) if cache else None, force=force, resume=resume, scheduler=scheduler, reporter=_RichReporter(bar))
    except KeyboardInterrupt:
        from nenv.train.loop import partial_folder

        _say(f"nenv: training interrupted; its state is kept in {partial_folder(out)}: continue with the same command and --resume")
        raise typer.Exit(130) from None
    m = res.record["metrics"]
    typer.echo(
        f"model {res.record['record_id']} written to {out} in {res.record['wall_s']:.0f} s\n"
        f"held-out speakers: envelope LSD 3.4-8 kHz neural {m['val_envelope_lsd_high_db']['neural']:.2f} dB vs codebook "
        f"{m['val_envelope_lsd_high_db']['codebook']:.2f} dB; median level error {m['val_median_level_error_db']['neural']:+.2f} dB; "
        f"guard rejects {100 * m['val_guard_rejection_rate']:.2f}% of hops"
    )
    for w in res.record.get("warnings", []):
        _say(f"nenv: warning: {w}")


@app.command()
@_guarded
def export(
    model: Annotated[Path, typer.Argument(help="Model folder made by 'nenv train' (needs model.pt and nenv.json).")],
) -> None:
    """Re-export a model folder's torch weights to model.onnx and check it against torch."""
    try:
        from nenv.train.export import export_checkpoint
    except ImportError as e:
        raise InputError(f"export needs the train extra: pip install 'nenv[train]' ({e})") from e
    diff = export_checkpoint(model)
    typer.echo(f"wrote {model / 'model.onnx'} (onnx.checker passed; onnxruntime vs torch max difference {diff:.1e})")
