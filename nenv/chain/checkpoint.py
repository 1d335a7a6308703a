"""Read a trained model folder for inference (numpy + onnxruntime, no torch).

A checkpoint folder holds:

* ``model.onnx``: raw features in, wideband shape cepstra and high-band level
  out (normalisation folded in); its metadata repeats the feature settings;
* ``codebook.npz``: the paired codebook (fallback and baseline);
* ``nenv.json``: format version, feature settings, guard limits, model
  arguments, normalisation statistics, the resolved training recipe, the
  training record id and, optionally, the calibration of the added band
  (``"calibration": {"band_trim_db": ...}``, see :data:`TRIM_RANGE_DB`);
* optionally ``model.pt`` (torch weights, for re-export), ``record.json`` and
  ``curves.png`` from training.
"""

from __future__ import annotations

import json
import os
import threading
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from nenv.errors import ConfigError
from nenv.chain.estimators.codebook import Codebook
from nenv.chain.features import FeatureSettings
from nenv.chain.guard import GuardLimits

FORMAT = "nenv-checkpoint"
FORMAT_VERSION = 1
META_FEATURES = "nenv_features"  # ONNX metadata key holding the feature settings (JSON)
MODEL_FILE = "model.onnx"
CODEBOOK_FILE = "codebook.npz"
SETTINGS_FILE = "nenv.json"
TRIM_RANGE_DB = (-40.0, 12.0)  # a calibration's band_trim_db must lie in this range (dB re the trained level)
KEEP_BOUND_ROWS = 64  # Checkpoint.predict keeps its bound buffers between runs of at most this many rows


def session_options(*, flush_denormals: bool = False):
    """onnxruntime settings for a gateway: one thread, no spin-waiting, optionally denormals flushed.

    One intra-op thread per session keeps one call on one core (a gateway runs
    many calls side by side); spin-waiting would burn a core between hops.
    ``flush_denormals`` makes onnxruntime switch the calling thread's floating-point
    unit to flush-to-zero / denormals-are-zero, which avoids slow paths on tiny
    values but changes that thread's arithmetic for everything else in the process
    too (numpy included). ``nenv stream`` turns it on; a library caller decides.
    """
    import onnxruntime as ort

    so = ort.SessionOptions()
    so.intra_op_num_threads = 1
    so.inter_op_num_threads = 1
    so.execution_mode = ort.ExecutionMode.ORT_SEQUENTIAL
    so.add_session_config_entry("session.intra_op.allow_spinning", "0")
    so.add_session_config_entry("session.inter_op.allow_spinning", "0")
    if flush_denormals:
        so.add_session_config_entry("session.set_denormal_as_zero", "1")
    so.log_severity_level = 3
    return so


@dataclass
class Checkpoint:
    """A loaded model folder."""

    path: Path
    features: FeatureSettings
    limits: GuardLimits
    codebook: Codebook
    info: dict
    flush_denormals: bool = False
    band_trim_db: float = 0.0  # level of the added high band against the trained level (the folder's calibration)
    _session: object = field(default=None, repr=False)
    _bound: threading.local = field(default_factory=threading.local, init=False, repr=False, compare=False)  # per thread: IOBinding buffers (predict); a copy (dataclasses.replace) starts its own
    _lock: threading.Lock = field(default_factory=threading.Lock, init=False, repr=False, compare=False)  # making the session

    def session(self):
        """The onnxruntime session (created on first use, once even when threads ask at the same time;
        a model file that fails its checks is refused at every use, never kept)."""
        if self._session is None:
            with self._lock:
                if self._session is None:
                    self._session = self._open_session()
        return self._session

    def _open_session(self):
        import onnxruntime as ort

        try:
            session = ort.InferenceSession(str(self.path / MODEL_FILE), sess_options=session_options(flush_denormals=self.flush_denormals), providers=["CPUExecutionProvider"])
        except Exception as e:  # onnxruntime raises its own Fail / InvalidProtobuf types
            raise ConfigError(f"cannot load '{self.path / MODEL_FILE}': {str(e).splitlines()[0]}") from e
        meta = session.get_modelmeta().custom_metadata_map
        if META_FEATURES not in meta:
            raise ConfigError(f"'{self.path / MODEL_FILE}' has no nenv feature settings in its metadata: not a nenv model")
        embedded = FeatureSettings.from_dict(json.loads(meta[META_FEATURES]))
        FeatureSettings().check_compatible(embedded, what=f"the model '{self.path / MODEL_FILE}'")
        if embedded != self.features:
            raise ConfigError(f"'{self.path / MODEL_FILE}' and '{self.path / SETTINGS_FILE}' disagree on the feature settings")
        return session

    def prepare(self) -> None:
        """Make the session and run it once on one zero row (bound for this thread), so that a call's
        first hop does not wait for onnxruntime's import, the session and its first run (some 30 ms on
        a quiet machine, 0.3 s on a busy one); a broken model.onnx is reported here. Results do not
        depend on it."""
        self._run(np.zeros((1, self.features.input_dim)))

    def predict(self, x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Run the network on stacked raw features [shape=(n, input_dim)] -> (ceps (n, 20), level_db (n,))."""
        if x.shape[0] == 0:
            return np.zeros((0, self.features.n_wb_ceps)), np.zeros(0)
        return self._run(x)

    def _run(self, x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        session = self.session()
        run = self._bound.__dict__
        if run.get("shape") != x.shape:
            run.clear()
            run.update(_binding(session, x.shape), shape=x.shape)
        np.copyto(run["input"], x, casting="same_kind")  # rounded to float32 as astype would
        session.run_with_iobinding(run["binding"])
        ceps, level = run["outputs"]
        ceps, level = ceps.astype(np.float64), level[:, 0].astype(np.float64)
        if x.shape[0] > KEEP_BOUND_ROWS:
            run.clear()  # a large batch's buffers are not kept: allocating them costs little beside its run
        return ceps, level


def _binding(session, shape: tuple[int, int]) -> dict:
    """An onnxruntime IOBinding of ``session`` to float32 buffers for ``shape`` rows of input: a run
    then neither allocates nor converts its inputs and outputs (a one-row run of the shipped model
    costs some 10 us instead of 15, its 99th percentile 18 instead of 40). Kept per thread for the last
    batch size up to KEEP_BOUND_ROWS rows by :meth:`Checkpoint.predict`; the results are those of
    ``session.run``, bit for bit."""
    n = shape[0]
    inp = np.empty(shape, dtype=np.float32)
    binding = session.io_binding()
    binding.bind_input(session.get_inputs()[0].name, "cpu", 0, np.float32, list(shape), inp.ctypes.data)
    outputs = []
    for o in session.get_outputs():
        out = np.empty([n] + [int(d) for d in o.shape[1:]], dtype=np.float32)
        binding.bind_output(o.name, "cpu", 0, np.float32, list(out.shape), out.ctypes.data)
        outputs.append(out)
    return {"input": inp, "binding": binding, "outputs": outputs}


def load(path: str | os.PathLike, *, flush_denormals: bool = False) -> Checkpoint:
    """Load and validate a checkpoint folder; ConfigError with the reason if anything is off.

    ``flush_denormals``: see :func:`session_options`.
    """
    p = Path(path)
    if not p.is_dir():
        raise ConfigError(f"model folder '{p}' does not exist: check the path given by --model or $NENV_MODEL, or train one with 'nenv train'")
    for name in (MODEL_FILE, CODEBOOK_FILE, SETTINGS_FILE):
        if not (p / name).is_file():
            raise ConfigError(f"model folder '{p}' has no {name}: it is incomplete")
    try:
        info = json.loads((p / SETTINGS_FILE).read_text(encoding="utf-8"))
    except (OSError, ValueError) as e:
        raise ConfigError(f"cannot read '{p / SETTINGS_FILE}': {e}") from e
    if info.get("format") != FORMAT:
        raise ConfigError(f"'{p / SETTINGS_FILE}' is not a nenv checkpoint description")
    if info.get("format_version") != FORMAT_VERSION:
        raise ConfigError(f"'{p}' has checkpoint format {info.get('format_version')}, this nenv reads format {FORMAT_VERSION}")
    try:
        feats = FeatureSettings.from_dict(info["features"])
        limits = GuardLimits.from_dict(info["guard"])
    except (KeyError, TypeError) as e:
        raise ConfigError(f"'{p / SETTINGS_FILE}' lacks a valid 'features' or 'guard' section: {e}") from e
    FeatureSettings().check_compatible(feats, what=f"the model in '{p}'")
    trim = band_trim(info.get("calibration", {}), where=f"'{p / SETTINGS_FILE}'")
    return Checkpoint(p, feats, limits, Codebook.load(p / CODEBOOK_FILE), info, flush_denormals, trim)


def band_trim(calibration, *, where: str) -> float:
    """The ``band_trim_db`` of a model folder's calibration section (0 when absent); ConfigError naming
    ``where`` when it is not a number within TRIM_RANGE_DB."""
    if not isinstance(calibration, dict):
        raise ConfigError(f"{where}: 'calibration' must be a table such as {{\"band_trim_db\": -6.0}}, got {calibration!r}")
    return check_trim(calibration.get("band_trim_db", 0.0), what=f"{where}: calibration band_trim_db", error=ConfigError)


def check_trim(value, *, what: str, error=ConfigError) -> float:
    """``value`` as a float when it is a number of dB within TRIM_RANGE_DB, else ``error`` naming ``what``."""
    lo, hi = TRIM_RANGE_DB
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not lo <= value <= hi:
        raise error(f"{what} must be a number of dB from {lo:g} to {hi:g}, got {value!r}")
    return float(value)


def default_path() -> Path | None:
    """Where the default model is: $NENV_MODEL, else the shipped one, else None.

    The shipped model is checkpoints/default of a source checkout, installed as
    nenv/_checkpoints/default.
    """
    env = os.environ.get("NENV_MODEL")
    if env:
        return Path(env)
    package = Path(__file__).resolve().parents[1]  # nenv/
    for cand in (package.parent / "checkpoints" / "default", package / "_checkpoints" / "default"):
        if (cand / MODEL_FILE).is_file():
            return cand
    return None
