"""The command line, as a user meets it: good runs, and one clear line for every bad input."""

from __future__ import annotations

import json
import os
import re

import numpy as np
import pytest
import soundfile as sf
from typer.testing import CliRunner

from nenv.cli import app
from tests.conftest import ARCTIC

runner = CliRunner()


def _run(*args):
    return runner.invoke(app, [str(a) for a in args], catch_exceptions=False)


def _assert_user_error(res, needle):
    assert res.exit_code == 2, res.output
    err = res.stderr.strip()
    assert err.startswith("nenv: error:") and len(err.splitlines()) == 1, err
    assert needle in err, err
    assert "Traceback" not in res.output


@pytest.fixture
def nb_file(tmp_path):
    out = tmp_path / "call.wav"
    res = _run("degrade", ARCTIC[0], out, "--law", "mulaw")
    assert res.exit_code == 0, res.output
    return out


def test_degrade_then_extend(nb_file, tmp_path):
    info = sf.info(nb_file)
    assert info.samplerate == 8000 and info.frames == 32000
    out = tmp_path / "wide.wav"
    fig = tmp_path / "wide.png"
    res = _run("extend", nb_file, out, "--figure", fig)
    assert res.exit_code == 0, res.output
    y, sr = sf.read(out)
    assert sr == 16000 and y.size == 2 * info.frames
    assert fig.stat().st_size > 10000
    assert sorted(p.name for p in tmp_path.iterdir()) == ["call.wav", "wide.png", "wide.wav"]


@pytest.mark.parametrize(("method", "excitation"), [("neural", "fold"), ("codebook", "modulate"), ("imaging", "rectify")])
def test_extend_runs_the_method_and_excitation_asked_for(nb_file, tmp_path, method, excitation):
    # The file written equals the library's extension with the same system, to the 16-bit sample.
    from nenv.chain import pipeline
    from nenv.media.audio import to_int16

    out = tmp_path / f"{method}-{excitation}.wav"
    res = _run("extend", nb_file, out, "--method", method, "--excitation", excitation)
    assert res.exit_code == 0, res.output
    x, _ = sf.read(nb_file)
    want = to_int16(pipeline.extend(x, system=pipeline.make_system(method, excitation=excitation)).y)
    got, _ = sf.read(out, dtype="int16")
    np.testing.assert_array_equal(got, want)


def test_resample_on_the_fly_equals_resampling_at_once(tmp_path):
    # --resample streams the file through soxr in blocks (two here: 12.3 s at 44.1 kHz); the result
    # equals soxr's one-shot high-quality resampling (the reference) extended, sample for sample, at
    # exactly round(n * 8000 / 44100) input samples.
    import soxr

    from nenv.chain import pipeline
    from nenv.media.audio import to_int16

    x = 0.1 * np.random.default_rng(0).standard_normal(int(44100 * 12.3))
    sf.write(tmp_path / "in.wav", x, 44100, subtype="FLOAT")
    res = _run("extend", tmp_path / "in.wav", tmp_path / "out.wav", "--resample", "--method", "unextended")
    assert res.exit_code == 0, res.output
    nb = soxr.resample(x, 44100, 8000, quality="HQ")
    assert nb.size == round(x.size * 8000 / 44100)
    got, _ = sf.read(tmp_path / "out.wav", dtype="int16")
    np.testing.assert_array_equal(got, to_int16(pipeline.extend(nb, system=pipeline.make_system("unextended")).y))


def test_an_existing_output_is_kept_unless_overwrite_one_file_as_in_a_batch(nb_file, tmp_path):
    out = tmp_path / "wb.wav"
    out.write_bytes(b"not audio, but mine")
    res = _run("extend", nb_file, out, "--method", "imaging")
    assert res.exit_code == 0 and "skipped" in res.stderr and "--overwrite" in res.stderr
    assert out.read_bytes() == b"not audio, but mine"
    res = _run("extend", nb_file, out, "--method", "imaging", "--overwrite")
    assert res.exit_code == 0 and out.read_bytes()[:4] == b"RIFF"


def test_fixed_sets_of_values_are_checked_by_the_command_line_and_listed(nb_file, tmp_path):
    for args, option in ((("extend", nb_file, tmp_path / "o.wav", "--method", "folding"), "--method"), (("degrade", ARCTIC[0], tmp_path / "d.wav", "--law", "ulaw"), "--law"), (("extend", nb_file, tmp_path / "o.wav", "--excitation", "square"), "--excitation")):
        res = _run(*args)
        assert res.exit_code == 2 and option in res.output, res.output
    helptext = _run("extend", "--help").output
    assert "neural|codebook|imaging|unextended|oracle|true-band" in helptext and "rectify|fold|modulate" in helptext
    assert "<bool>" not in helptext and "--overwrite" in helptext  # switches read as switches, not as options taking a value


def test_extend_oracle_needs_reference(nb_file, tmp_path):
    _assert_user_error(_run("extend", nb_file, tmp_path / "o.wav", "--method", "oracle"), "--reference")
    res = _run("extend", nb_file, tmp_path / "o.wav", "--method", "oracle", "--reference", ARCTIC[0])
    assert res.exit_code == 0, res.output


def test_evaluate_prints_every_system_and_measure(tmp_path):
    res = _run("evaluate", *ARCTIC, "--out", tmp_path / "ev", "--law", "none", "--law", "alaw", "--method", "unextended", "--method", "imaging", "--method", "oracle")
    assert res.exit_code == 0, res.output
    for word in ["unextended", "imaging", "oracle", "LSD 3.4-8k", "env LSD", "HB level err", "WB-PESQ", "alaw", "**mean**"]:
        assert word in res.stdout
    rows = (tmp_path / "ev" / "table.csv").read_text().splitlines()
    assert len(rows) == 1 + 2 * 2 * 3 + 2 * 3
    assert (tmp_path / "ev" / "spectrograms.png").stat().st_size > 20000
    assert "estimated, not recorded" in (tmp_path / "ev" / "table.md").read_text()


def test_extend_reports_a_short_input_in_milliseconds_and_no_speed(tmp_path):
    y, _ = sf.read(ARCTIC[0])
    sf.write(tmp_path / "short.wav", y[16000:16060:2], 8000)  # 30 samples at 8 kHz
    res = _run("extend", tmp_path / "short.wav", tmp_path / "out.wav", "--method", "imaging")
    assert res.exit_code == 0, res.output
    assert "(16 kHz, 3.8 ms, method=imaging)" in res.stderr and "real time" not in res.stderr
    assert sf.info(tmp_path / "out.wav").frames == 60


@pytest.mark.parametrize("model, shipped, want", [(None, True, "ALL_SYSTEMS"), (None, False, "DEFAULT_SYSTEMS"), ("given", False, "ALL_SYSTEMS")])
def test_evaluate_compares_every_system_it_can_run_when_none_is_named(tmp_path, monkeypatch, model, shipped, want):
    """Without --method: with a model (the shipped one, or --model) every system, the model's two included;
    with none the four that need no model."""
    from nenv.chain import checkpoint
    from nenv.report import evaluate as ev

    class Seen(Exception):
        pass

    def run(references, *, systems, **kwargs):
        raise Seen(systems)

    shipped_path = checkpoint.default_path()
    if shipped_path is None:
        pytest.skip("no shipped default model in this checkout")
    monkeypatch.setattr(checkpoint, "default_path", lambda: shipped_path if shipped else None)
    monkeypatch.setattr(ev, "run", run)
    extra = ["--model", str(shipped_path)] if model else []
    with pytest.raises(Seen) as seen:
        _run("evaluate", ARCTIC[0], "--out", tmp_path / "ev", *extra)
    assert seen.value.args[0] == getattr(ev, want)


def test_evaluate_means_per_speaker_group(tmp_path):
    # groups as tests/data/heldout/clips.csv gives them: ARCTIC bdl (a0007) male, slt (a0009) female
    import csv

    (tmp_path / "g.csv").write_text("clip,group\narctic_a0007,male\narctic_a0009,female\n")
    res = _run("evaluate", *ARCTIC, "--out", tmp_path / "ev", "--method", "unextended", "--method", "imaging", "--groups", tmp_path / "g.csv")
    assert res.exit_code == 0, res.output
    rows = {(r["clip"], r["system"]): r for r in csv.DictReader(open(tmp_path / "ev" / "table.csv"))}
    for system in ("unextended", "imaging"):
        for group, clip in (("male", "arctic_a0007"), ("female", "arctic_a0009")):
            assert rows[f"mean {group}", system]["lsd_high"] == rows[clip, system]["lsd_high"]  # one clip per group
        both = (float(rows["arctic_a0007", system]["visqol"]) + float(rows["arctic_a0009", system]["visqol"])) / 2
        assert float(rows["mean", system]["visqol"]) == pytest.approx(both, abs=1e-4)
    assert "**mean female**" in res.stdout


def test_evaluate_in_worker_processes_writes_the_same_table(tmp_path):
    """``--jobs 2`` scores the references in two processes: the same table, rows in the same order. Run
    as a command with a time limit: the failure this guards against was a worker that never ended."""
    import sys

    from tests.conftest import run_bounded

    args = ["evaluate", *map(str, ARCTIC), "--method", "unextended", "--method", "imaging", "--law", "mulaw"]
    res = _run(*args, "--out", tmp_path / "one", "--jobs", "1")
    assert res.exit_code == 0, res.output
    two = run_bounded([sys.executable, "-m", "nenv", *args, "--out", str(tmp_path / "two"), "--jobs", "2"])
    assert two.returncode == 0, two.stderr[-3000:]
    one_table = (tmp_path / "one" / "table.csv").read_text()
    assert (tmp_path / "two" / "table.csv").read_text() == one_table and one_table.count("arctic_a0007") == 2


def test_evaluate_says_why_a_value_is_blank(tmp_path):
    import soundfile as sf

    # 0.2 s of a real sentence: too short for the pesq package (it needs 1/4 s beyond its margins)
    y, sr = sf.read(ARCTIC[0])
    sf.write(tmp_path / "short.wav", y[int(0.5 * sr) : int(0.7 * sr)], sr)
    res = _run("evaluate", tmp_path / "short.wav", ARCTIC[0], "--out", tmp_path / "ev", "--method", "unextended", "--method", "imaging")
    assert res.exit_code == 0, res.output
    assert "WB-PESQ [MOS] is blank (nan) for short (none)" in res.stderr and "a0007" not in res.stderr.split("blank")[1].split("\n")[0]
    assert "WB-PESQ [MOS] is blank" in (tmp_path / "ev" / "table.md").read_text()
    full = _run("evaluate", ARCTIC[0], "--out", tmp_path / "ev2", "--method", "unextended")
    assert full.exit_code == 0 and "blank" not in full.stderr


@pytest.mark.parametrize("command", [["demo"], ["evaluate", str(ARCTIC[0])], ["audit", "guard.jsonl"], ["survey", str(ARCTIC[0].parent)]])
def test_every_out_folder_option_refuses_a_file(tmp_path, command):
    (tmp_path / "taken").write_text("not a folder")
    _assert_user_error(_run(*command, "--out", tmp_path / "taken"), "exists and is not a folder")
    assert (tmp_path / "taken").read_text() == "not a folder"


def test_demo_runs(tmp_path):
    res = _run("demo", "--out", tmp_path / "d")
    assert res.exit_code == 0, res.output
    assert (tmp_path / "d" / "order_confirmation_16k.wav").exists()
    assert (tmp_path / "d" / "order_confirmation.png").exists()


def _write(path, data, sr, subtype="PCM_16"):
    sf.write(path, data, sr, subtype=subtype)
    return path


def test_bad_inputs_get_one_clear_line_and_no_output(tmp_path):
    out = tmp_path / "out.wav"
    t = np.arange(8000) / 8000
    speech = 0.1 * np.sin(2 * np.pi * 440 * t)
    cases = [
        (tmp_path / "missing.wav", "does not exist"),
        (tmp_path, "must be a folder"),
        (tmp_path / "text.wav", "cannot read"),
        (_write(tmp_path / "empty.wav", np.zeros(0), 8000), "no samples"),
        (_write(tmp_path / "nan.wav", np.where(t < 0.5, speech, np.nan), 8000, "FLOAT"), "NaN"),
        (_write(tmp_path / "stereo.wav", np.stack([speech, speech], 1), 8000), "--channel"),
        (_write(tmp_path / "odd.wav", speech, 11025), "11025 Hz"),
        (_write(tmp_path / "wide.wav", speech, 16000), "nenv degrade"),
    ]
    (tmp_path / "text.wav").write_text("RIFF? no, just text")
    for path, needle in cases:
        _assert_user_error(_run("extend", path, out), needle)
        assert not out.exists()
    ok = _write(tmp_path / "ok.wav", speech, 8000)
    _assert_user_error(_run("extend", ok, tmp_path / "no" / "such" / "dir.wav"), "does not exist")
    _assert_user_error(_run("extend", ok, tmp_path / "x.mp3"), ".wav")
    res = _run("extend", ok, out, "--method", "magic")  # a value outside a fixed set: refused by the command line library
    assert res.exit_code == 2 and "'magic' is not one of" in res.output and not out.exists()
    assert _run("extend", tmp_path / "stereo.wav", out, "--channel", "1").exit_code == 0
    assert _run("extend", tmp_path / "odd.wav", tmp_path / "r.wav", "--resample").exit_code == 0
    leftovers = [p for p in os.listdir(tmp_path) if p.endswith(".part.wav")]
    assert leftovers == []


@pytest.mark.parametrize("law", ["none", "mulaw"])
def test_degrade_warns_when_the_level_clips(tmp_path, law):
    from nenv.dsp import channel
    from nenv.media.audio import to_int16

    res = _run("degrade", ARCTIC[0], tmp_path / "loud.wav", "--law", law, "--level-dbov", "6")
    assert res.exit_code == 0 and "were clipped" in res.stderr
    y, _ = sf.read(tmp_path / "loud.wav", dtype="int16")
    ref, sr = sf.read(ARCTIC[0])
    np.testing.assert_array_equal(y, to_int16(channel.telephone(ref, sr=sr, law=law, level_dbov=6.0)))  # the channel, unchanged
    quiet = _run("degrade", ARCTIC[0], tmp_path / "nominal.wav", "--law", law)
    assert quiet.exit_code == 0 and "clipped" not in quiet.stderr


def test_degrade_refuses_narrowband(tmp_path):
    p = _write(tmp_path / "nb.wav", 0.1 * np.ones(800), 8000)
    _assert_user_error(_run("degrade", p, tmp_path / "o.wav"), "wideband")
    res = _run("degrade", ARCTIC[0], tmp_path / "o.wav", "--law", "ulaw")
    assert res.exit_code == 2 and "'ulaw' is not one of 'mulaw', 'alaw', 'none'" in res.output


def test_evaluate_refuses_narrowband_reference(nb_file, tmp_path):
    _assert_user_error(_run("evaluate", nb_file, "--out", tmp_path / "ev"), "wideband")


def test_model_commands(trained, synthetic_corpus, tmp_path):
    pytest.importorskip("torch")
    # survey
    res = _run("survey", synthetic_corpus, "--out", tmp_path / "sv", "--set", "min_snr_db=0")
    assert res.exit_code == 0, res.output
    assert "kept:" in res.stdout and (tmp_path / "sv" / "survey.csv").is_file()
    assert (tmp_path / "sv" / "survey.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (ISO/IEC 15948)
    # the summary line agrees with the table it wrote (durations to the table's 4 digits)
    import csv

    rows = list(csv.DictReader((tmp_path / "sv" / "survey.csv").open()))
    kept = [r for r in rows if not r["excluded"]]
    assert 0 < len(kept)
    said = re.search(r"files: (\d+)  kept: (\d+) \(([\d.]+) min, ([\d.]+) min active, (\d+) speakers\)", res.stdout)
    assert said, res.stdout
    assert (int(said[1]), int(said[2]), int(said[5])) == (len(rows), len(kept), len({r["speaker"] for r in kept}))
    assert float(said[3]) == pytest.approx(sum(float(r["duration_s"]) for r in kept) / 60, abs=0.051)
    assert float(said[4]) == pytest.approx(sum(float(r["active_s"]) for r in kept) / 60, abs=0.051)
    assert f"wrote {tmp_path / 'sv' / 'survey.csv'}, {tmp_path / 'sv' / 'survey.png'}" in res.stderr
    # one line per reason, its count the files the table gives that reason (with their details in brackets)
    parts = [p for r in rows for p in r["excluded"].split("; ") if p]
    said = {k: int(v) for k, v in re.findall(r"^  excluded, (.+): (\d+)$", res.stdout, re.M)}
    assert parts and sum(said.values()) == len(parts), res.stdout
    for reason, n in said.items():
        assert n == sum(p.startswith(reason) for p in parts), (reason, parts)
    # a short training run through the command line, into folders that do not exist yet (as the README's example)
    m = tmp_path / "models" / "quick" / "m"
    res = _run("train", "--config", "configs/small.toml", "--set", f"corpus={synthetic_corpus}", "--set", "epochs=2",
               "--set", "codebook_size=8", "--set", "min_snr_db=0", "--out", m)
    assert res.exit_code == 0, res.output
    assert "held-out speakers" in res.stdout and (m / "model.onnx").is_file()
    rec = json.loads((m / "record.json").read_text())
    lsd, level = rec["metrics"]["val_envelope_lsd_high_db"], rec["metrics"]["val_median_level_error_db"]["neural"]
    assert f"model {rec['record_id']} written to {m}" in res.stdout
    assert (f"neural {lsd['neural']:.2f} dB vs codebook {lsd['codebook']:.2f} dB; median level error {level:+.2f} dB; "
            f"guard rejects {100 * rec['metrics']['val_guard_rejection_rate']:.2f}% of hops") in res.stdout, res.stdout
    # what the run should not hide is said on stderr, one warning per line (a few minutes of synthetic speech)
    assert "nenv: warning: only " in res.stderr and "minutes of active speech were kept" in res.stderr, res.stderr
    _assert_user_error(_run("train", "--set", "epochz=2", "--out", tmp_path / "m2"), "epochz")
    _assert_user_error(_run("train", "--set", f"corpus={synthetic_corpus}", "--out", m), "--force")
    (tmp_path / "a-file").write_text("x")
    _assert_user_error(_run("train", "--set", f"corpus={synthetic_corpus}", "--out", tmp_path / "a-file" / "m"), "is a file")
    # export
    res = _run("export", m)
    assert res.exit_code == 0 and "onnx.checker passed" in res.stdout
    # extend with the model, the guard reporting on stderr
    nb = tmp_path / "nb.wav"
    assert _run("degrade", ARCTIC[1], nb).exit_code == 0
    res = _run("extend", nb, tmp_path / "wb.wav", "--model", trained.out)
    assert res.exit_code == 0, res.output
    assert "method=neural" in res.stderr and "guard:" in res.stderr
    # ... and the band is that model's: the output equals the model's offline extension, not the shipped model's
    from nenv.chain import pipeline
    from nenv.media import audio

    x, _ = sf.read(nb)
    ours = sf.read(tmp_path / "wb.wav", dtype="int16")[0]
    for folder, same in ((trained.out, True), (None, False)):
        offline = pipeline.extend(x, system=pipeline.make_system("neural", model=pipeline.load_model(folder))).y
        assert np.array_equal(ours, audio.to_int16(offline)) == same, folder
    _assert_user_error(_run("extend", nb, tmp_path / "wb2.wav", "--model", tmp_path / "nomodel"), "does not exist: check the path given by --model")
    # evaluate with every system
    res = _run("evaluate", ARCTIC[1], "--out", tmp_path / "ev", "--model", trained.out)
    assert res.exit_code == 0, res.output
    for s in ("unextended", "imaging", "codebook", "neural", "oracle"):
        assert f"| {s} |" in res.stdout


def test_version_flag():
    from nenv import __version__

    res = _run("--version")
    assert res.exit_code == 0 and res.stdout.strip() == f"nenv {__version__}"


def test_degrade_codes_g711_mu_law_by_default_and_refuses_absurd_noise(tmp_path):
    """The default telephone version is a PCMU call: every sample lies on the mu-law grid (ITU-T G.711
    decoding table, checked against the stdlib's audioop in tests/test_g711.py)."""
    from nenv.dsp import g711

    out = tmp_path / "nb.wav"
    res = _run("degrade", ARCTIC[0], out)
    assert res.exit_code == 0 and "law=mulaw" in res.stderr
    y, sr = sf.read(out, dtype="int16")
    grid = np.round(g711.decode(np.arange(256, dtype=np.uint8), law="mulaw") * 32768).astype(int)
    assert sr == 8000 and np.isin(y.astype(int), grid).all()
    assert _run("degrade", ARCTIC[0], tmp_path / "lin.wav", "--law", "none").exit_code == 0
    lin, _ = sf.read(tmp_path / "lin.wav", dtype="int16")
    assert not np.isin(lin.astype(int), grid).all()  # a linear channel does not: the check can fail
    for bad in ("-200", "1000"):
        _assert_user_error(_run("degrade", ARCTIC[0], tmp_path / "x.wav", "--snr-db", bad), "--snr-db")
    # noise within the range (its edges included): white, set against the wideband speech before the channel,
    # so 10 dB less SNR is 10 dB more noise in the output; the band-pass then keeps about 3100/8000 of the
    # noise and most of the speech, so the telephone band's SNR comes out a few dB better (measured 31.6 at 30)
    for snr in ("-10", "20", "30", "100"):
        assert _run("degrade", ARCTIC[0], tmp_path / f"n{snr}.wav", "--law", "none", "--snr-db", snr).exit_code == 0
    clean, _ = sf.read(tmp_path / "lin.wav")
    noise_db = {snr: 10 * np.log10(np.mean((sf.read(tmp_path / f"n{snr}.wav")[0] - clean) ** 2)) for snr in ("20", "30", "100")}
    assert noise_db["20"] - noise_db["30"] == pytest.approx(10.0, abs=1.0)  # measured 9.4: the level is set after the noise
    from nenv.dsp import channel

    band_snr = channel.active_level_dbov(clean, sr=8000) - noise_db["30"]  # dBov is 10 log10 of the mean square (full scale 1.0)
    assert 30.0 < band_snr < 30.0 + 10 * np.log10(8000 / 3100)
    assert noise_db["100"] < -100  # at 100 dB the noise is below 16-bit rounding (measured -110 dB; at 30 dB, -58)


@pytest.mark.parametrize(
    "args, needle",
    [
        (["degrade", "a.wav", "b.wav", "--level-dbov", "abc"], "'--level-dbov'"),
        (["extend", "--jobs", "-1", "a.wav", "b"], "'--jobs'"),
        (["relay", "--to", "127.0.0.1:9", "--step-ms", "1"], "'--step-ms'"),
        (["audit", "x.jsonl"], "Missing option '--out'"),
        (["no-such-command"], "No such command"),
        (["extend", "call.wav"], "an input and an output are needed"),
        (["extend", "a.wav", "b.wav", "--method", "magic"], "'magic' is not one of 'neural', 'codebook'"),
        (["stream", "--input-format", "wav"], "'wav' is not one of 's16le', 'mulaw', 'alaw'"),
        (["evaluate", "r.wav", "--out", "o", "--law", "ulaw"], "'ulaw' is not one of"),
        (["relay", "--to", "::1:5004"], "IPv6 address in brackets"),
    ],
)
def test_usage_errors_are_one_line_with_status_2(args, needle):
    """As the README promises: the command line library's own usage errors (bad type, out of range,
    missing option, unknown command) are one line on stderr, like nenv's own, not a boxed panel."""
    import subprocess
    import sys

    res = subprocess.run([sys.executable, "-m", "nenv", *args], capture_output=True, text=True, timeout=120)
    assert res.returncode == 2 and res.stdout == ""
    err = res.stderr.strip()
    assert err.startswith("nenv: error:") and len(err.splitlines()) == 1 and needle in err, err
    assert "╭" not in err and "Traceback" not in err


def test_limited_samples_are_explained(tmp_path):
    """The limiter acts on the sum of the telephone band and the added band; the warning says so."""
    t = np.arange(8000) / 8000
    loud = _write(tmp_path / "loud.wav", 0.995 * np.sin(2 * np.pi * 1500 * t) * np.sign(np.sin(2 * np.pi * 3 * t)), 8000)
    res = _run("extend", loud, tmp_path / "out.wav", "--method", "imaging")
    assert res.exit_code == 0, res.output
    assert "were limited" in res.stderr and "telephone band plus added band" in res.stderr
    y, _ = sf.read(tmp_path / "out.wav")
    assert np.abs(y).max() <= 0.99 + 1 / 32768  # the limiter's ceiling (about -0.1 dBFS), one 16-bit step of rounding


@pytest.mark.parametrize(
    "text, want",
    [
        ("127.0.0.1:5004", ("127.0.0.1", 5004)),
        ("[::1]:5004", ("::1", 5004)),
        ("gateway.example:0", ("gateway.example", 0)),
        (":6000", ("127.0.0.1", 6000)),
        ("[fe80::1%eth0]:65535", ("fe80::1%eth0", 65535)),
        ("[::1:5004", "in brackets"),  # an opening bracket without its closing one
        ("::1]:5004", "in brackets"),
        ("::1:5004", "in brackets"),
        ("127.0.0.1:65536", "must look like HOST:PORT"),
        ("127.0.0.1", "must look like HOST:PORT"),
        ("5004", "must look like HOST:PORT"),  # a port alone: no host meant, none guessed
        ("127.0.0.1:-1", "must look like HOST:PORT"),
        ("[::1]", "e.g. \\[::1\\]:5004"),  # no port: either message shows the form
    ],
)
def test_host_and_port_as_the_relay_reads_them(text, want):
    from nenv.cli.live import _hostport
    from nenv.errors import InputError

    if isinstance(want, tuple):
        assert _hostport(text, "--listen") == want
    else:
        with pytest.raises(InputError, match=want):
            _hostport(text, "--listen")
