"""ONNX export of a trained network, with its feature settings in the model's metadata."""

from __future__ import annotations

import json
import os
from pathlib import Path

import numpy as np

from nenv import __version__
from nenv.chain.checkpoint import META_FEATURES
from nenv.errors import ConfigError

PARITY_TOL = 1e-5  # max |onnxruntime - torch| on a test batch, in units of each output's training std
OPSET = 17


def load_torch(path: str | os.PathLike):
    """Rebuild the deployable module from model.pt (loaded with weights_only=True)."""
    import torch

    from nenv.train.model import Deployable, EnvelopeMLP, ModelConfig

    try:
        blob = torch.load(path, map_location="cpu", weights_only=True)
    except Exception as e:  # torch raises UnpicklingError, RuntimeError, ...
        raise ConfigError(f"cannot load '{path}' as a nenv torch checkpoint: {str(e).splitlines()[0]}") from e
    try:
        cfg = ModelConfig.from_dict(blob["config"])
        mlp = EnvelopeMLP(cfg)
        mlp.load_state_dict(blob["state_dict"])
        norm = blob["normalisation"]
        model = Deployable(mlp, norm["x_mean"], norm["x_std"], norm["y_mean"], norm["y_std"])
    except (KeyError, RuntimeError, TypeError) as e:
        raise ConfigError(f"'{path}' is not a complete nenv torch checkpoint: {e}") from e
    model.eval()
    return model, blob


def export(pt_path: str | os.PathLike, onnx_path: str | os.PathLike, *, metadata: dict[str, str]) -> float:
    """Write the ONNX model, check it with onnx.checker and compare onnxruntime with torch.

    The difference is measured in units of each output's training standard deviation
    (the scale the network itself works in; float32 rounding of a -50 dB level is
    already ~4e-6 dB). Returns the largest difference (ConfigError above PARITY_TOL).
    """
    import onnx
    import onnxruntime as ort
    import torch

    from nenv.media.files import atomic_output

    model, blob = load_torch(pt_path)
    dim = int(blob["config"]["input_dim"])
    example = torch.zeros(4, dim)
    with atomic_output(onnx_path) as tmp:
        torch.onnx.export(
            model,
            (example,),
            str(tmp),
            input_names=["features"],
            output_names=["cepstra", "level_db"],
            dynamic_axes={"features": {0: "hops"}, "cepstra": {0: "hops"}, "level_db": {0: "hops"}},
            opset_version=OPSET,
            dynamo=False,
        )
        proto = onnx.load(str(tmp))
        for k, v in {**metadata, "nenv_version": __version__}.items():
            entry = proto.metadata_props.add()
            entry.key, entry.value = k, v
        proto.producer_name = "nenv"
        onnx.checker.check_model(proto, full_check=True)
        onnx.save(proto, str(tmp))
        rng = np.random.default_rng(0)
        mean = np.asarray(blob["normalisation"]["x_mean"], dtype=np.float32)
        std = np.asarray(blob["normalisation"]["x_std"], dtype=np.float32)
        x = (mean + std * rng.standard_normal((256, dim))).astype(np.float32)
        with torch.no_grad():
            ref_c, ref_l = (t.numpy() for t in model(torch.from_numpy(x)))
        sess = ort.InferenceSession(str(tmp), providers=["CPUExecutionProvider"])
        got_c, got_l = sess.run(None, {"features": x})
        y_std = np.asarray(blob["normalisation"]["y_std"], dtype=np.float64)
        diff = float(max(np.max(np.abs(got_c - ref_c) / y_std[:-1]), np.max(np.abs(got_l - ref_l) / y_std[-1])))
        if not diff <= PARITY_TOL:
            raise ConfigError(f"onnxruntime and torch disagree by {diff:.2e} (> {PARITY_TOL}) on the exported model")
    return diff


def metadata_for(info: dict) -> dict[str, str]:
    """The ONNX metadata entries derived from a checkpoint's nenv.json."""
    return {
        META_FEATURES: json.dumps(info["features"], sort_keys=True),
        "nenv_record_id": str(info.get("record_id", "")),
        "nenv_corpus": json.dumps(info.get("corpus", {}), sort_keys=True),
    }


def export_checkpoint(folder: str | os.PathLike) -> float:
    """Re-export ``folder/model.pt`` to ``folder/model.onnx`` using ``folder/nenv.json``."""
    p = Path(folder)
    info_path = p / "nenv.json"
    if not (p / "model.pt").is_file() or not info_path.is_file():
        raise ConfigError(f"'{p}' needs model.pt and nenv.json to export (made by 'nenv train')")
    info = json.loads(info_path.read_text(encoding="utf-8"))
    return export(p / "model.pt", p / "model.onnx", metadata=metadata_for(info))
