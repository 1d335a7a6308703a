"""A training run from recipe to model folder: survey, split, features, MLP, codebook, guard, export.

The loss is :func:`nenv.train.model.training_loss`: the envelope's cepstra (or
its 3.4-8 kHz shape in dB) and the high-band level, an over-estimated level
costing ``over_weight`` times an under-estimate.
"""

from __future__ import annotations

import json
import os
import shutil
import time
import uuid
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np

from nenv import __version__
from nenv.dsp import cepstrum
from nenv.chain.checkpoint import CODEBOOK_FILE, FORMAT, FORMAT_VERSION, MODEL_FILE, SETTINGS_FILE
from nenv.errors import ConfigError, NenvError
from nenv.chain.estimators.codebook import Codebook
from nenv.chain.features import FeatureSettings, envelope_from_prediction
from nenv.media.files import is_within, write_text
from nenv.chain.guard import GuardLimits, telephone_band_mismatch
from nenv.settings import BAND_EDGE_HZ, WB_SR
from nenv.train import corpus, dataset, workdir
from nenv.train.workdir import RECIPE_FILE, RESUME_FILE, partial_folder
from nenv.train.recipe import Recipe

CALIBRATION_HOPS = 50000  # training hops used to calibrate the mismatch threshold


class Reporter:
    """Progress hooks; the CLI passes a rich-based one, tests the silent default."""

    def stage(self, name: str, total: int | None = None) -> Callable[[], None]:
        return lambda: None

    def log(self, msg: str) -> None:
        pass


@dataclass
class Result:
    out: Path
    record: dict


def guard_range(values: np.ndarray, recipe) -> tuple[float, float]:
    """A guard range from the training hops' true values (high-band or low-band level re the narrowband
    frame): the (100 - guard_percentile)th to the guard_percentile-th percentile, widened by level_margin_db."""
    lo, hi = np.percentile(values, [100 - recipe.guard_percentile, recipe.guard_percentile])
    return float(lo - recipe.level_margin_db), float(hi + recipe.level_margin_db)


def envelope_lsd(ceps_true, level_true, ceps_pred, level_pred) -> np.ndarray:
    """Per-hop high-band LSD (dB) between two envelopes given as shape cepstra + level.

    Both are turned into stable order-16 envelopes with gains at a common narrowband
    energy; the distance is the RMS over 3.4-8 kHz bins of the dB difference.
    """
    z = np.zeros(len(level_true))
    a_t, g_t = envelope_from_prediction(ceps_true, level_true, z)
    a_p, g_p = envelope_from_prediction(ceps_pred, level_pred, z)
    n_fft = 512
    sel = np.fft.rfftfreq(n_fft, 1 / WB_SR) >= BAND_EDGE_HZ
    d = 10 * np.log10(cepstrum.power_spectrum(a_t, gain=g_t, n_fft=n_fft)[:, sel]) - 10 * np.log10(cepstrum.power_spectrum(a_p, gain=g_p, n_fft=n_fft)[:, sel])
    return np.sqrt(np.mean(d * d, axis=1))


def _predict(model, x: np.ndarray, x_mean, x_std, y_mean, y_std) -> tuple[np.ndarray, np.ndarray]:
    import torch

    out = []
    with torch.no_grad():
        for s in range(0, x.shape[0], 65536):
            z = torch.from_numpy(((x[s : s + 65536] - x_mean) / x_std).astype(np.float32))
            out.append(model(z).numpy().astype(np.float64) * y_std + y_mean)
    y = np.concatenate(out) if out else np.zeros((0, y_mean.size))
    return y[:, :-1], y[:, -1]


def train(
    recipe: Recipe,
    out: str | os.PathLike,
    *,
    cache_dir: str | None = None,
    force: bool = False,
    resume: bool = False,
    scheduler: str | None = None,
    reporter: Reporter | None = None,
) -> Result:
    """Run ``recipe`` and write a complete model folder at ``out`` (atomically: all or nothing).

    The run works in a hidden folder next to ``out`` (``.NAME.partial``) and saves its
    state there after every epoch (:data:`RESUME_FILE`, written atomically). If the run is
    killed or interrupted, that folder stays; ``resume=True`` continues from the last
    saved epoch with the same recipe and gives the same model as an uninterrupted run.
    Without ``cache_dir`` the features are cached in the partial folder, so a resumed run
    does not recompute them. ``scheduler``: a dask.distributed address for the survey and
    the features (see :mod:`nenv.serve.parallel`).
    """
    rep = reporter or Reporter()
    out = Path(out)
    if out.exists() and not out.is_dir():
        raise ConfigError(f"'{out}' is a file: a model is a folder; choose another name")
    if out.exists() and not force and any(out.iterdir()):
        raise ConfigError(f"'{out}' exists and is not empty: choose another folder or pass --force to replace it")
    if out.is_dir() and any(out.iterdir()) and not (out / SETTINGS_FILE).is_file():
        raise ConfigError(f"'{out}' is not a nenv model folder (it has no {SETTINGS_FILE}): --force replaces model folders only; choose another folder")
    for label, inner in (("the corpus", recipe.corpus), ("the manifest", recipe.manifest), ("the cache folder", cache_dir)):
        if inner and is_within(inner, out):
            raise ConfigError(f"{label} '{inner}' is inside '{out}', which training replaces as a whole: choose another folder for the model")
    if out.parent.exists() and not out.parent.is_dir():
        raise ConfigError(f"cannot create '{out}': '{out.parent}' is a file")
    if not recipe.corpus:
        raise ConfigError("the recipe names no corpus: set corpus = \"FOLDER\" or pass --set corpus=FOLDER")
    t_start = time.perf_counter()
    try:
        out.parent.mkdir(parents=True, exist_ok=True)  # like every other --out: missing folders are made
    except OSError as e:
        raise ConfigError(f"cannot create '{out.parent}': {e.strerror}") from e
    settings = FeatureSettings(context=recipe.context)
    work = partial_folder(out)
    state = workdir.open_work(work, recipe, resume=resume, force=force)
    record_id = state["record_id"] if state else time.strftime("%Y%m%dT%H%M%S") + "-" + uuid.uuid4().hex[:6]
    if not state:
        write_text(work / RECIPE_FILE, json.dumps({"record_id": record_id, "recipe": recipe.to_dict()}, indent=1))
    cache_dir = cache_dir or str(work / "features")
    keep_work = True  # a kill, Ctrl-C or crash leaves a resumable folder; a user error removes it
    try:
        # 1. corpus survey and speaker-disjoint split
        files = corpus.scan(recipe.corpus, speaker_rule=recipe.speaker_rule, manifest=recipe.manifest)
        if recipe.max_files and len(files) > recipe.max_files:
            pick = np.sort(np.random.default_rng(recipe.split_seed).choice(len(files), recipe.max_files, replace=False))
            files = [files[i] for i in pick]
        tick = rep.stage(f"surveying {len(files)} files", len(files))
        reports = corpus.survey(files, recipe, workers=recipe.workers, scheduler=scheduler, on_done=tick)
        write_text(work / "survey.csv", corpus.reports_csv(reports))
        corpus.survey_figure(reports, work / "survey.png")
        corp = corpus.summary(reports)
        rep.log(f"corpus: {corp['kept_files']} of {corp['files']} files kept ({corp['kept_active_hours'] * 60:.1f} min active speech, {corp['speakers']} speakers); excluded: {corp['exclusion_reasons'] or 'none'}")
        tr_files, va_files = corpus.split_speakers(reports, val_fraction=recipe.val_fraction, seed=recipe.split_seed, val_speakers=recipe.val_speakers, train_speakers=recipe.train_speakers)
        # 2. paired features
        tick = rep.stage("paired features", len(tr_files) + len(va_files))
        tr, thr_tr = dataset.build([r.path for r in tr_files], recipe=recipe, settings=settings, cache_dir=cache_dir, workers=recipe.workers, scheduler=scheduler, on_done=tick)
        va, thr_va = dataset.build([r.path for r in va_files], recipe=recipe, settings=settings, cache_dir=cache_dir, workers=recipe.workers, scheduler=scheduler, on_done=tick)
        if tr.x.shape[0] < recipe.codebook_size or va.x.shape[0] == 0:
            raise ConfigError(f"too little usable speech: {tr.x.shape[0]} training and {va.x.shape[0]} validation hops")
        wall_feat = thr_tr["wall_s"] + thr_va["wall_s"]
        feat_speed = (thr_tr["seconds_audio"] + thr_va["seconds_audio"]) / max(wall_feat, 1e-9)
        rep.log(f"features: {tr.x.shape[0]} training and {va.x.shape[0]} validation hops, {feat_speed:.0f}x real time")
        # 3. normalisation and model (torch is imported only now, after the worker processes are done)
        import torch

        from nenv.train.export import export, metadata_for
        from nenv.train.model import EnvelopeMLP, ModelConfig, training_loss

        x_mean, x_std = tr.x.mean(axis=0), np.maximum(tr.x.std(axis=0), 1e-6)
        y_tr = np.column_stack([tr.ceps, tr.level])
        y_va = np.column_stack([va.ceps, va.level])
        y_mean, y_std = y_tr.mean(axis=0), np.maximum(y_tr.std(axis=0), 1e-6)
        torch.manual_seed(recipe.seed)
        torch.set_num_threads(max(1, recipe.threads))
        cfg = ModelConfig(input_dim=settings.input_dim, hidden=tuple(recipe.hidden), n_ceps=settings.n_wb_ceps, dropout=recipe.dropout)
        model = EnvelopeMLP(cfg)
        opt = torch.optim.AdamW(model.parameters(), lr=recipe.learning_rate, weight_decay=recipe.weight_decay)
        sched = torch.optim.lr_scheduler.ReduceLROnPlateau(opt, factor=0.5, patience=max(1, recipe.patience // 3))
        xt = torch.from_numpy(((tr.x - x_mean) / x_std).astype(np.float32))
        yt = torch.from_numpy(((y_tr - y_mean) / y_std).astype(np.float32))
        xv = torch.from_numpy(((va.x - x_mean) / x_std).astype(np.float32))
        yv = torch.from_numpy(((y_va - y_mean) / y_std).astype(np.float32))

        loss_fn = training_loss(recipe.loss, y_std=y_std, level_weight=recipe.level_weight, over_weight=recipe.over_weight)

        gen = torch.Generator().manual_seed(recipe.seed)
        history = []
        best = (float("inf"), None, -1)
        first, finished = 0, False
        state = workdir.load_state(work) if state else None
        if state:
            rep.log(f"resuming run {record_id} after epoch {state['epoch']}")
            model.load_state_dict(state["model"])
            opt.load_state_dict(state["optimizer"])
            sched.load_state_dict(state["scheduler"])
            gen.set_state(state["generator"])
            torch.set_rng_state(state["torch_rng"])
            history, best, first, finished = state["history"], tuple(state["best"]), state["epoch"], state["finished"]
            t_start -= float(state.get("wall_s", 0.0))  # the record's wall time covers the interrupted part too
        tick = rep.stage("training", recipe.epochs)
        for _ in range(first):
            tick()
        for epoch in range(first, recipe.epochs if not finished else first):
            model.train()
            perm = torch.randperm(xt.shape[0], generator=gen)
            total, count = 0.0, 0
            for s in range(0, xt.shape[0], recipe.batch_size):
                idx = perm[s : s + recipe.batch_size]
                opt.zero_grad()
                loss = loss_fn(model(xt[idx]), yt[idx])
                loss.backward()
                opt.step()
                total += float(loss.detach()) * idx.numel()
                count += idx.numel()
            model.eval()
            with torch.no_grad():
                pv = model(xv)
                val_loss = float(loss_fn(pv, yv))
            lev_err = (pv[:, -1].numpy() - yv[:, -1].numpy()) * y_std[-1]
            history.append({"epoch": epoch + 1, "train_loss": total / count, "val_loss": val_loss, "val_median_level_error_db": float(np.median(lev_err)), "lr": opt.param_groups[0]["lr"]})
            sched.step(val_loss)
            tick()
            if val_loss < best[0] - 1e-5:
                best = (val_loss, {k: v.clone() for k, v in model.state_dict().items()}, epoch + 1)
            elif epoch + 1 - best[2] >= recipe.patience and epoch + 1 < recipe.epochs:
                rep.log(f"early stop after epoch {epoch + 1}: no validation gain since epoch {best[2]}")
                finished = True
            workdir.save_state(work, record_id=record_id, epoch=epoch + 1, finished=finished or epoch + 1 == recipe.epochs, model=model, opt=opt, sched=sched, gen=gen, history=history, best=best, wall_s=time.perf_counter() - t_start)
            if finished:
                break
        model.load_state_dict(best[1])
        model.eval()
        with torch.no_grad():  # the weights that ship are the best epoch's: their loss says so in the record
            saved_val_loss = float(loss_fn(model(xv), yv))
        # 4. codebook and guard calibration
        book = Codebook.fit(tr.current, tr.ceps, tr.level, size=recipe.codebook_size, seed=recipe.seed)
        pick = np.random.default_rng(recipe.seed).permutation(tr.x.shape[0])[:CALIBRATION_HOPS]
        c_cal, l_cal = _predict(model, tr.x[pick], x_mean, x_std, y_mean, y_std)
        a_cal, _ = envelope_from_prediction(c_cal, l_cal, np.zeros(pick.size))
        mismatch = telephone_band_mismatch(a_cal, tr.a_nb[pick])
        level_lo, level_hi = guard_range(tr.level, recipe)
        low_lo, low_hi = guard_range(tr.low, recipe)
        limits = GuardLimits(
            level_min_db=level_lo,
            level_max_db=level_hi,
            mismatch_max_db=float(np.percentile(mismatch, recipe.guard_percentile)),
            novelty_max=book.novelty_limit,
            stability_margin=recipe.stability_margin,
            low_min_db=low_lo,
            low_max_db=low_hi,
        )
        # 5. validation: network vs codebook on held-out speakers
        c_va, l_va = _predict(model, va.x, x_mean, x_std, y_mean, y_std)
        cell, _ = book.nearest(va.current)
        lsd_nn = envelope_lsd(va.ceps, va.level, c_va, l_va)
        lsd_cb = envelope_lsd(va.ceps, va.level, book.ceps[cell], book.level_db[cell])
        from nenv.chain.guard import Guard

        a_va, g_va = envelope_from_prediction(c_va, l_va, np.zeros(len(l_va)))
        _, nov = book.nearest(va.current)
        dec = Guard(limits).check(ceps=c_va, level_db=l_va, a=a_va, gain=g_va, a_nb=va.a_nb, novelty=nov, cell=cell)
        metrics = {
            "val_envelope_lsd_high_db": {"neural": float(np.mean(lsd_nn)), "codebook": float(np.mean(lsd_cb))},
            "val_median_level_error_db": {"neural": float(np.median(l_va - va.level)), "codebook": float(np.median(book.level_db[cell] - va.level))},
            "val_guard_rejection_rate": float(np.mean(dec.rejected)),
            "best_epoch": best[2],
            "best_val_loss": best[0],
            "saved_model_val_loss": saved_val_loss,
        }
        rep.log(f"validation (held-out speakers): envelope LSD 3.4-8 kHz neural {metrics['val_envelope_lsd_high_db']['neural']:.2f} dB, codebook {metrics['val_envelope_lsd_high_db']['codebook']:.2f} dB; median level error {metrics['val_median_level_error_db']['neural']:+.2f} dB; guard rejects {100 * metrics['val_guard_rejection_rate']:.2f}%")
        # 6. write the folder
        norm = {"x_mean": x_mean.tolist(), "x_std": x_std.tolist(), "y_mean": y_mean.tolist(), "y_std": y_std.tolist()}
        torch.save({"config": cfg.to_dict(), "state_dict": model.state_dict(), "normalisation": {k: torch.tensor(v) for k, v in norm.items()}, "record_id": record_id}, work / "model.pt")
        book.save(work / CODEBOOK_FILE)
        corpus_info = {**corp, "root": recipe.corpus, "train_speakers": sorted({r.speaker for r in tr_files}), "val_speakers": sorted({r.speaker for r in va_files})}
        info = {
            "format": FORMAT,
            "format_version": FORMAT_VERSION,
            "nenv_version": __version__,
            "record_id": record_id,
            "features": settings.to_dict(),
            "guard": limits.to_dict(),
            "calibration": {"band_trim_db": recipe.band_trim_db},
            "model": cfg.to_dict(),
            "normalisation": norm,
            "recipe": recipe.to_dict(),
            "corpus": {k: corpus_info[k] for k in ("files", "kept_files", "kept_hours", "kept_active_hours", "speakers", "exclusion_reasons")},
        }
        write_text(work / SETTINGS_FILE, json.dumps(info, indent=1))
        parity = export(work / "model.pt", work / MODEL_FILE, metadata=metadata_for(info))
        record = {
            "record_id": record_id,
            "nenv_version": __version__,
            "recipe": recipe.to_dict(),
            "corpus": corpus_info,
            "data": {"train_hops": int(tr.x.shape[0]), "val_hops": int(va.x.shape[0]), "feature_x_real_time": feat_speed, "feature_wall_s": wall_feat},
            "history": history,
            "metrics": metrics,
            "onnx_parity_max_abs": parity,
            "wall_s": time.perf_counter() - t_start,
            "warnings": quality_warnings(metrics, corp),
        }
        write_text(work / "record.json", json.dumps(record, indent=1))
        _curves(history, work / "curves.png")
        for leftover in (work / RESUME_FILE, work / RECIPE_FILE):
            leftover.unlink(missing_ok=True)
        shutil.rmtree(work / "features", ignore_errors=True)
        workdir.install(work, out)
    except NenvError:
        keep_work = False
        raise
    finally:
        if work.exists() and not keep_work:
            shutil.rmtree(work, ignore_errors=True)
    return Result(out, record)


MIN_ACTIVE_MINUTES = 5.0  # common practice, not a measured limit: less speech rarely generalises to new speakers
MAX_LEVEL_OVER_DB = 0.5  # median over-estimate of the high-band level on held-out speakers that earns a warning: any systematic one


def quality_warnings(metrics: dict, corpus_summary: dict) -> list[str]:
    """What a finished run should not hide: a network no better than its own codebook on held-out
    speakers, a systematically too-loud high band, or very little training speech."""
    out = []
    lsd = metrics["val_envelope_lsd_high_db"]
    if not lsd["neural"] < lsd["codebook"]:
        out.append(f"on held-out speakers the network is no closer to the true envelope than its own codebook ({lsd['neural']:.2f} vs {lsd['codebook']:.2f} dB): train on more speech or for more epochs before using it")
    level = metrics["val_median_level_error_db"]["neural"]
    if level > MAX_LEVEL_OVER_DB:
        out.append(f"the network over-estimates the high band's level by {level:+.2f} dB (median, held-out speakers): a too-loud band is harsh and tiring to hear; retrain (a larger over_weight, more speech) before using it")
    minutes = 60 * corpus_summary["kept_active_hours"]
    if minutes < MIN_ACTIVE_MINUTES:
        out.append(f"only {minutes:.1f} minutes of active speech were kept for training (a rule of thumb asks for {MIN_ACTIVE_MINUTES:g} or more): expect errors on new speakers")
    return out


def _curves(history: list[dict], path: Path) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from nenv.media.files import atomic_output

    ep = [h["epoch"] for h in history]
    fig, ax = plt.subplots(1, 2, figsize=(9, 3.2), layout="constrained")
    ax[0].plot(ep, [h["train_loss"] for h in history], label="training")
    ax[0].plot(ep, [h["val_loss"] for h in history], label="validation (held-out speakers)")
    ax[0].set_xlabel("epoch")
    ax[0].set_ylabel("loss")
    ax[0].set_yscale("log")
    ax[0].legend(fontsize=8)
    ax[1].plot(ep, [h["val_median_level_error_db"] for h in history], color="tab:red")
    ax[1].axhline(0, color="grey", lw=0.6)
    ax[1].set_xlabel("epoch")
    ax[1].set_ylabel("median high-band level error [dB]")
    with atomic_output(path) as tmp:
        fig.savefig(tmp, dpi=110, format="png")
    plt.close(fig)
