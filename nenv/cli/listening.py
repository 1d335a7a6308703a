"""Listening panels: ``nenv panel`` prepares a blind test as one web page (multi-stimulus with hidden
reference and anchor, ITU-R BS.1534; or pairs against the unextended signal, ITU-T P.800 Annex E),
``nenv verdicts`` analyses the results the listeners send back."""

from __future__ import annotations

from pathlib import Path
import enum
from typing import Annotated, Optional

import typer

from nenv.cli.app import Law, _guarded, _kernels_ready, _progress, _say, _unknown_clips, app

PanelMethod = enum.Enum("PanelMethod", [(v, v) for v in ("neural", "codebook", "imaging")], type=str)
PanelDesign = enum.Enum("PanelDesign", [(v, v) for v in ("mushra", "ccr")], type=str)


@app.command()
@_guarded
def panel(
    references: Annotated[list[Path], typer.Argument(help="Wideband reference recordings (16 kHz or more), one trial each.", show_default=False)],
    out: Annotated[Path, typer.Option(help="Folder for page/index.html (what listeners open) and key.json (keep it; the analysis reads it).")],
    method: Annotated[list[PanelMethod], typer.Option(help="Systems to compare; repeat. The hidden reference and unextended (the anchor) are always in.")] = [PanelMethod.neural],
    model: Annotated[Optional[Path], typer.Option(help="Model folder for neural and codebook (default: $NENV_MODEL, else the shipped model).")] = None,
    law: Annotated[Law, typer.Option(help="G.711 law of the telephone channel applied to the references.")] = "mulaw",
    post_url: Annotated[Optional[str], typer.Option(help="Also POST each listener's results (JSON) to this URL when they finish (they can always save a file).")] = None,
    overwrite: Annotated[bool, typer.Option("--overwrite", help="Replace a panel already in --out (its key is lost: results of that panel can no longer be analysed).")] = False,
    band_trim: Annotated[list[float], typer.Option("--band-trim", help="Also present each model system (neural, codebook) with its added band at this level in dB against the trained level, as a system of its own (e.g. 'neural -6 dB'); repeat for several.", show_default=False)] = [],
    design: Annotated[PanelDesign, typer.Option(help="mushra: rate every version against the open original (ITU-R BS.1534); ccr: rate pairs, each system against the unextended signal with no original, as a caller hears it (ITU-T P.800 Annex E).")] = PanelDesign.mushra,
) -> None:
    """Prepare a blind listening test as one web page (versions against the original, or pairs against the unextended signal)."""
    _kernels_ready()
    from nenv.report import panel as pn

    from nenv.chain.systems import MODEL_SYSTEMS
    from nenv.report.verdicts import ANCHOR, HIDDEN_REFERENCE

    with _progress() as bar:
        systems = [m.value for m in method]
        runs = len(set(systems)) + len(set(band_trim)) * len(set(systems) & set(MODEL_SYSTEMS))
        task = bar.add_task("preparing the panel", total=len(references) * runs)
        key = pn.prepare([str(p) for p in references], out, systems=systems, model=model, law=law, post_url=post_url, on_step=lambda s: bar.advance(task), overwrite=overwrite, design=design.value, band_trims=band_trim)
    n = len(key["trials"])
    asked = [s for s in key["systems"] if s not in (HIDDEN_REFERENCE, ANCHOR)]
    if design.value == "ccr":
        _say(f"wrote {out / 'page' / 'index.html'}: {n} pair{'s' if n != 1 else ''} ({', '.join(asked)} against unextended in both orders, and the original against unextended), levels aligned")
    else:
        _say(f"wrote {out / 'page' / 'index.html'}: {n} trial{'s' if n != 1 else ''} of {len(key['systems'])} stimuli ({', '.join(key['systems'])}), levels aligned")
    _say(f"kept the key in {out / 'key.json'} (not for listeners); analyse the results with: nenv verdicts RESULTS.json... --key {out / 'key.json'} --out DIR")


@app.command()
@_guarded
def verdicts(
    results: Annotated[list[Path], typer.Argument(help="Results files the panel page saved (one per listener session).", show_default=False)],
    key: Annotated[Path, typer.Option(help="The panel's key.json (written by nenv panel).")],
    out: Annotated[Path, typer.Option(help="Folder for verdicts.md, verdicts.csv, ratings.csv and verdicts.png (created if missing).")],
    default_system: Annotated[str, typer.Option(help="The system compared pairwise with every other (versions against the original).")] = "neural",
    groups: Annotated[Optional[Path], typer.Option(help="CSV with the columns clip and group (e.g. female/male; clip = a reference's file name without suffix): adds a result per group.")] = None,
) -> None:
    """Analyse a listening panel: screening, mean scores with 95% intervals, paired differences."""
    from nenv.media.files import output_folder, write_text
    from nenv.report import ccr
    from nenv.report import verdicts as vd
    from nenv.report.evaluate import read_groups

    group_table = read_groups(groups) if groups is not None else None
    if ccr.is_pairs_key(key):
        kind, ratings = ccr, ccr.read([str(p) for p in results], key)
        found = ccr.analyse(ratings, groups=group_table)
    else:
        kind, ratings = vd, vd.read([str(p) for p in results], key)
        found = vd.analyse(ratings, default_system=default_system, groups=group_table)
    _unknown_clips({r.clip for r in ratings}, group_table, groups)
    folder = output_folder(out)
    write_text(folder / "ratings.csv", kind.ratings_csv(ratings))  # every rating, excluded listeners' too
    md = kind.to_markdown(found)
    write_text(folder / "verdicts.md", md)
    write_text(folder / "verdicts.csv", kind.to_csv(found))
    if found.listeners:
        kind.figure(found, folder / "verdicts.png")
    typer.echo(md)
