"""Assemble nenv's default training corpus from Debian packages, offline and reproducibly.

Usage (on Debian/Ubuntu; ~10 minutes on 2 cores)::

    apt-get install klettres-data fillets-ng-data-cs fillets-ng-data-nl ktuberling-data megaglest-data festival wamerican witalian festvox-kallpc16k festvox-kdlpc16k \\
        festvox-czech-dita festvox-czech-krb festvox-czech-machac festvox-czech-ph festival-czech \\
        festvox-italp16k festvox-itapc16k festlex-ifd festvox-suopuhe-lj festvox-suopuhe-mv
    python -m nenv.train.open_corpus --out corpora/default

Sources:

* klettres-data: real recordings of letters and syllables by native speakers of
  ~20 languages (one speaker or group per language folder), 44.1 kHz Ogg, GPL-2+.
  Used in place (the manifest points at /usr/share/klettres).
* fillets-ng-data-cs, fillets-ng-data-nl: game dialogue recorded by actors (Czech and Dutch),
  44.1 kHz Ogg, GPL-2+. Two main voices per language (the small and the big fish, ~650 files
  each) and ~20 minor characters; the speaker id is the language and the character code of the
  file name (``LEVEL-CODE-phrase.ogg``), per level for the minor characters (their codes are
  reused by other characters in other levels). Used in place.
* ktuberling-data: single spoken words, one speaker per language folder, GPL-2+; the folders
  sampled at 8 kHz are excluded by the survey as narrowband. Used in place.
* megaglest-data: acted unit replies ("ack" and "select" files only: the others are weapon
  and creature sounds), one speaker id per unit, CC-BY-SA-3.0. Used in place.
* Festival diphone voices, rendered here from text of our own: random word
  sequences drawn from Debian's word lists (English, Italian) or from
  syllable inventories (Czech, Finnish), in the encoding each voice expects
  (Czech ISO-8859-2, Italian and Finnish ISO-8859-1), at half amplitude so
  no voice clips. Rendered speech is a stand-in for real speech: it widens
  the range of vocal tracts (four of the voices are female or a child) but
  its high band is a diphone database's, not a person's in the moment.

Never added: festvox-us-slt-hts or anything else made from a CMU ARCTIC
speaker (the held-out test sentences in tests/data include that speaker).
The corpus survey, not this script, decides which files training uses.
"""

from __future__ import annotations

import argparse
import csv
import shutil
import subprocess
import sys
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np

KLETTRES = Path("/usr/share/klettres")
FILLETS = Path("/usr/share/games/fillets-ng/sound")
KTUBERLING = Path("/usr/share/ktuberling/sounds")
MEGAGLEST = Path("/usr/share/games/megaglest/techs/megapack/factions")
MAIN_FISH = ("m", "v")  # fillets character codes of the two main voices (small fish, big fish)
# voice, language, text encoding, Debian package, who speaks, licence (from the package's copyright file)
VOICES = [
    ("kal_diphone", "en", "UTF-8", "festvox-kallpc16k", "adult male", "free (CMU/Edinburgh, attribution)"),
    ("ked_diphone", "en", "UTF-8", "festvox-kdlpc16k", "adult male", "free (CMU/Edinburgh, attribution)"),
    ("czech_dita", "cs", "ISO-8859-2", "festvox-czech-dita", "adult female", "GPL-3+"),
    ("czech_krb", "cs", "ISO-8859-2", "festvox-czech-krb", "child (male)", "GPL-3+"),
    ("czech_machac", "cs", "ISO-8859-2", "festvox-czech-machac", "adult male", "GPL-3+"),
    ("czech_ph", "cs", "ISO-8859-2", "festvox-czech-ph", "adult male", "GPL-2+"),
    ("lp_diphone", "it", "ISO-8859-1", "festvox-italp16k", "adult female", "GPL-2+"),
    ("pc_diphone", "it", "ISO-8859-1", "festvox-itapc16k", "adult male", "GPL-2+"),
    ("suo_fi_lj_diphone", "fi", "ISO-8859-1", "festvox-suopuhe-lj", "adult female", "LGPL-2.1+"),
    ("hy_fi_mv_diphone", "fi", "ISO-8859-1", "festvox-suopuhe-mv", "adult male", "LGPL-2.1+"),
]
FORBIDDEN = ("slt", "arctic")  # voices made from CMU ARCTIC speakers
WORDLISTS = {"en": Path("/usr/share/dict/american-english"), "it": Path("/usr/share/dict/italian")}
SYLLABLES = {
    "cs": ("b c č d ď f g h ch j k l m n ň p r ř s š t ť v z ž".split(), "a á e é ě i í o ó u ú ů y ý".split()),
    "fi": ("h j k l m n p r s t v".split(), "a aa e ee i ii o oo u uu y yy ä ää ö ai ei oi ui au ie uo yö".split()),
}
WORDS_PER_UTTERANCE = (6, 14)


def _words(lang: str, rng: np.random.Generator, n: int) -> list[str]:
    if lang in WORDLISTS and WORDLISTS[lang].is_file():
        pool = [w for w in WORDLISTS[lang].read_text(encoding="utf-8", errors="ignore").split() if w.isalpha() and w.islower() and 2 <= len(w) <= 11]
        return [pool[i] for i in rng.integers(len(pool), size=n)]
    cons, vowels = SYLLABLES.get(lang, SYLLABLES["fi"])
    out = []
    for _ in range(n):
        k = int(rng.integers(1, 4))
        w = "".join(cons[int(rng.integers(len(cons)))] + vowels[int(rng.integers(len(vowels)))] for _ in range(k))
        if rng.random() < 0.3:
            w += cons[int(rng.integers(len(cons)))]
        out.append(w)
    return out


def sentences(lang: str, *, n: int, seed: int) -> list[str]:
    """``n`` pseudo-sentences of our own in ``lang``."""
    rng = np.random.default_rng(seed)
    out = []
    for _ in range(n):
        words = _words(lang, rng, int(rng.integers(*WORDS_PER_UTTERANCE)))
        if len(words) > 7 and rng.random() < 0.5:
            words[len(words) // 2 - 1] += ","
        words[0] = words[0].capitalize()
        out.append(" ".join(words) + ("?" if rng.random() < 0.15 else "."))
    return out


def render(voice: str, encoding: str, texts: list[str], folder: Path) -> list[Path]:
    """Render each text with Festival into folder/uNNNN.wav, in one Festival process."""
    folder.mkdir(parents=True, exist_ok=True)
    lines = [f"(voice_{voice})"]
    paths = []
    for i, t in enumerate(texts):
        p = folder / f"u{i:04d}.wav"
        paths.append(p)
        t = t.replace("\\", " ").replace('"', " ")
        lines.append(f'(set! u (utt.synth (Utterance Text "{t}")))(utt.wave.rescale u 0.5)(utt.save.wave u "{p}" \'riff)')
    script = folder / "render.scm"
    script.write_bytes("\n".join(lines).encode(encoding, errors="replace"))
    res = subprocess.run(["festival", "-b", str(script)], capture_output=True, text=True, timeout=3600)
    script.unlink()
    done = [p for p in paths if p.is_file() and p.stat().st_size > 1000]
    if not done:
        raise RuntimeError(f"Festival rendered nothing for {voice}: {res.stderr.strip()[:300]}")
    return done


def real_speech() -> list[tuple[str, str]]:
    """(path, speaker) of the real recordings in the installed game and toy packages (used in place)."""
    rows = []
    if FILLETS.is_dir():
        for p in sorted(FILLETS.glob("*/*/*.ogg")):
            lang, parts = p.parent.name, p.stem.split("-")
            if lang == "en" or len(parts) < 3:  # English lines come with the base game data, not the two language packages
                continue
            who = parts[1] if parts[1] in MAIN_FISH else f"{p.parent.parent.name}-{parts[1]}"
            rows.append((str(p), f"fillets/{lang}/{who}"))
    if KTUBERLING.is_dir():
        for p in sorted(KTUBERLING.glob("*/*.ogg")) + sorted(KTUBERLING.glob("*/*.wav")):
            rows.append((str(p), f"ktuberling/{p.parent.name}"))
    if MEGAGLEST.is_dir():
        for p in sorted(MEGAGLEST.glob("*/units/*/sounds/*.wav")):
            if "_ack" in p.stem or "_select" in p.stem:
                rows.append((str(p), f"megaglest/{p.parents[3].name}/{p.parents[1].name}"))
    missing = [f.name for f in (FILLETS, KTUBERLING, MEGAGLEST) if not f.is_dir()]
    if missing:
        print(f"note: not installed, skipped: {' '.join(missing)}", file=sys.stderr)
    return rows


def prepare(out: Path, *, utterances_per_voice: int = 120, seed: int = 0, workers: int = 2) -> Path:
    """Render the voices, write manifest.csv (path,speaker) and SOURCES.md; return the manifest path."""
    if shutil.which("festival") is None:
        raise SystemExit("festival is not installed: see the apt-get line in this module's docstring")
    out.mkdir(parents=True, exist_ok=True)
    rows: list[tuple[str, str]] = []
    if KLETTRES.is_dir():
        for p in sorted(KLETTRES.rglob("*.ogg")):
            rows.append((str(p), "klettres/" + p.relative_to(KLETTRES).parts[0]))
    else:
        print("note: klettres-data is not installed; continuing with rendered voices only", file=sys.stderr)
    rows += real_speech()
    available = [v for v in VOICES if any(Path(d).is_dir() for d in Path("/usr/share/festival/voices").glob(f"*/{v[0]}"))]
    missing = [v[3] for v in VOICES if v not in available]
    if missing:
        print(f"note: voices not installed, skipped: {' '.join(missing)}", file=sys.stderr)
    for voice, *_ in available:
        assert not any(f in voice for f in FORBIDDEN), voice

    def job(k_v):
        k, (voice, lang, enc, *_rest) = k_v
        texts = sentences(lang, n=utterances_per_voice, seed=seed * 1000 + k)
        return voice, render(voice, enc, texts, out / "festival" / voice)

    with ThreadPoolExecutor(max_workers=workers) as pool:
        for voice, paths in pool.map(job, enumerate(available)):
            rows += [(str(p), f"festival/{voice}") for p in paths]
            print(f"{voice}: {len(paths)} utterances", file=sys.stderr)
    manifest = out / "manifest.csv"
    with open(manifest, "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(["path", "speaker"])
        w.writerows(rows)
    src = ["# Sources of this corpus", "", "| source | speakers | what | licence |", "|---|---|---|---|"]
    if KLETTRES.is_dir():
        src.append("| klettres-data (Debian) | one per language folder | letters and syllables read by native speakers, 44.1 kHz Ogg | GPL-2+ |")
    for folder, line in (
        (FILLETS, "| fillets-ng-data-cs, fillets-ng-data-nl (Debian) | two main voices per language and ~20 minor characters | acted game dialogue, Czech and Dutch, 44.1 kHz Ogg | GPL-2+ |"),
        (KTUBERLING, "| ktuberling-data (Debian) | one per language folder | single spoken words | GPL-2+ |"),
        (MEGAGLEST, "| megaglest-data (Debian) | one per unit | acted unit replies (ack, select) | CC-BY-SA-3.0 |"),
    ):
        if folder.is_dir():
            src.append(line)
    for voice, lang, _enc, pkg, who, lic in available:
        src.append(f"| {pkg} (Debian), voice {voice} | {who} | Festival diphone voice ({lang}) rendered from nenv's own random text | {lic} |")
    (out / "SOURCES.md").write_text("\n".join(src) + "\n", encoding="utf-8")
    return manifest


def main() -> None:
    ap = argparse.ArgumentParser(description="Assemble nenv's default training corpus from Debian packages.")
    ap.add_argument("--out", type=Path, required=True)
    ap.add_argument("--utterances", type=int, default=120, help="utterances rendered per Festival voice")
    ap.add_argument("--seed", type=int, default=0)
    args = ap.parse_args()
    print(prepare(args.out, utterances_per_voice=args.utterances, seed=args.seed))


if __name__ == "__main__":
    main()
