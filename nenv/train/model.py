"""The envelope network: a compact MLP from stacked narrowband features to wideband cepstra + level."""

from __future__ import annotations

from dataclasses import asdict, dataclass

import torch
from torch import nn


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
