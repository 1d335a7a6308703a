"""The envelope network: a compact MLP from stacked narrowband features to wideband cepstra + level,
and the loss it is trained with (see :func:`training_loss`)."""

from __future__ import annotations

from dataclasses import asdict, dataclass
from typing import Callable

import numpy as np
import torch
from torch import nn

from nenv.settings import BAND_EDGE_HZ, WB_SR

SHAPE_LOSS_POINTS = 48  # frequencies over 3.4-8 kHz where the "spectrum" loss compares shapes


@dataclass(frozen=True)
class ModelConfig:
    """Size of the network; stored in every checkpoint so it can be rebuilt."""

    input_dim: int
    hidden: tuple[int, ...] = (256, 256)
    n_ceps: int = 20
    dropout: float = 0.0

    def to_dict(self) -> dict:
        d = asdict(self)
        d["hidden"] = list(self.hidden)
        return d

    @classmethod
    def from_dict(cls, d: dict) -> "ModelConfig":
        return cls(input_dim=int(d["input_dim"]), hidden=tuple(int(h) for h in d["hidden"]), n_ceps=int(d["n_ceps"]), dropout=float(d["dropout"]))


class EnvelopeMLP(nn.Module):
    """Normalised features in, normalised (cepstra, level) out: ``n_ceps + 1`` values per hop."""

    def __init__(self, cfg: ModelConfig):
        super().__init__()
        layers: list[nn.Module] = []
        width = cfg.input_dim
        for h in cfg.hidden:
            layers += [nn.Linear(width, h), nn.GELU()]
            if cfg.dropout:
                layers.append(nn.Dropout(cfg.dropout))
            width = h
        layers.append(nn.Linear(width, cfg.n_ceps + 1))
        self.net = nn.Sequential(*layers)

    def forward(self, z: torch.Tensor) -> torch.Tensor:
        return self.net(z)


class Deployable(nn.Module):
    """The exported graph: raw features -> (cepstra, level_db), normalisation folded in."""

    def __init__(self, mlp: EnvelopeMLP, x_mean, x_std, y_mean, y_std):
        super().__init__()
        self.mlp = mlp
        self.register_buffer("x_mean", torch.as_tensor(x_mean, dtype=torch.float32))
        self.register_buffer("x_scale", 1.0 / torch.as_tensor(x_std, dtype=torch.float32))
        self.register_buffer("y_mean", torch.as_tensor(y_mean, dtype=torch.float32))
        self.register_buffer("y_std", torch.as_tensor(y_std, dtype=torch.float32))

    def forward(self, features: torch.Tensor):
        out = self.mlp((features - self.x_mean) * self.x_scale) * self.y_std + self.y_mean
        return out[:, :-1], out[:, -1:]


def training_loss(kind: str, *, y_std: np.ndarray, level_weight: float, over_weight: float) -> Callable[[torch.Tensor, torch.Tensor], torch.Tensor]:
    """The per-batch loss between normalised predictions and targets (both ``[shape=(n, n_ceps + 1)]``,
    cepstra then level, each column divided by its ``y_std``).

    ``kind = "cepstra"``: ``mean((c_pred - c_true)^2) + level_weight * mean(w * (l_pred - l_true)^2)`` on the
    normalised values. ``kind = "spectrum"``: the mean squared dB error of the envelope's *shape* over
    3.4-8 kHz (the cepstral error as a log magnitude, ``20/ln(10) * sum_n dc_n cos(n w)``, on
    :data:`SHAPE_LOSS_POINTS` frequencies, its mean over frequency removed because the level term fixes
    the band's power), plus ``level_weight`` times the level term in dB^2. Either way ``w = over_weight``
    where the level is over-estimated and 1 elsewhere, so the level's minimiser is the expectile
    ``1 / (1 + over_weight)`` (Newey & Powell 1987): below the mean, because listeners find too loud a
    high band far worse than too quiet a one.
    """
    y_std = np.asarray(y_std, dtype=np.float64)
    if kind == "spectrum":
        w_hb = np.pi * np.linspace(BAND_EDGE_HZ, WB_SR / 2, SHAPE_LOSS_POINTS) / (WB_SR / 2)
        basis = torch.from_numpy((20 / np.log(10) * np.cos(np.outer(np.arange(1, y_std.size), w_hb)) * y_std[:-1, None]).astype(np.float32))
        level_scale = float(y_std[-1])

        def spectrum_loss(pred: torch.Tensor, target: torch.Tensor) -> torch.Tensor:
            d = (pred[:, :-1] - target[:, :-1]) @ basis
            shape = torch.mean((d - d.mean(dim=1, keepdim=True)) ** 2)
            return shape + level_weight * _asymmetric_square((pred[:, -1] - target[:, -1]) * level_scale, over_weight)

        return spectrum_loss
    if kind != "cepstra":
        raise ValueError(f"unknown loss {kind!r}: 'cepstra' or 'spectrum'")

    def cepstra_loss(pred: torch.Tensor, target: torch.Tensor) -> torch.Tensor:
        ceps = torch.mean((pred[:, :-1] - target[:, :-1]) ** 2)
        return ceps + level_weight * _asymmetric_square(pred[:, -1] - target[:, -1], over_weight)

    return cepstra_loss


def _asymmetric_square(d: torch.Tensor, over_weight: float) -> torch.Tensor:
    """``mean(w * d^2)`` with ``w = over_weight`` where ``d > 0`` (an over-estimate), else 1."""
    w = torch.where(d > 0, torch.full_like(d, over_weight), torch.ones_like(d))
    return torch.mean(w * d * d)
