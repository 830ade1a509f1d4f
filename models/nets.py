"""Networks: a convolutional autoencoder plus two small heads, all built from one `ModelConfig`.

Images are (B, C, H, W) float tensors in [0, 1]; codes are (B, d); settings features are (B, F)
(cos/sin per periodic parameter, [-1, 1] otherwise; see `ParamSpace.features`).
"""
from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field

import torch
from torch import nn


@dataclass
class ModelConfig:
    resolution: int = 64          # pixels per side; a power of two >= 16
    channels: int = 1             # 1 grayscale, 3 RGB
    latent_dim: int = 3           # d
    feature_dim: int = 3          # F, length of the settings features
    base_width: int = 16          # channels at half resolution; doubles per level, capped
    max_width: int = 128
    refine_upto: int = 16         # decoder adds a 3x3 refinement conv at sizes up to this
    bottom: int = 4               # spatial size of the deepest feature map
    head_hidden: int = 128
    decoder_hidden: int = 256

    def __post_init__(self) -> None:
        levels = math.log2(self.resolution / self.bottom)
        if self.resolution < 16 or levels != int(levels):
            raise ValueError(f"resolution must be a power of two >= 16, got {self.resolution}")
        if self.channels not in (1, 3):
            raise ValueError(f"channels must be 1 or 3, got {self.channels}")
        if self.latent_dim < 1:
            raise ValueError(f"latent_dim must be >= 1, got {self.latent_dim}")

    @property
    def widths(self) -> list[int]:
        """Channels per level, from resolution / 2 down to `bottom`."""
        levels = int(math.log2(self.resolution / self.bottom))
        return [min(self.base_width * 2 ** i, self.max_width) for i in range(levels)]

    def to_dict(self) -> dict:
        return asdict(self)

    @classmethod
    def from_dict(cls, d: dict) -> "ModelConfig":
        names = cls.__dataclass_fields__
        return cls(**{k: v for k, v in d.items() if k in names})


def _mlp(n_in: int, hidden: int, n_out: int) -> nn.Sequential:
    return nn.Sequential(nn.Linear(n_in, hidden), nn.SiLU(), nn.Linear(hidden, hidden), nn.SiLU(),
                         nn.Linear(hidden, n_out))


class Encoder(nn.Module):
    def __init__(self, cfg: ModelConfig):
        super().__init__()
        w = cfg.widths
        layers: list[nn.Module] = []
        for a, b in zip([cfg.channels] + w[:-1], w):  # each level halves the size
            layers += [nn.Conv2d(a, b, 4, stride=2, padding=1), nn.SiLU()]
        self.features = nn.Sequential(*layers)
        self.out = nn.Sequential(nn.Flatten(), nn.Linear(w[-1] * cfg.bottom ** 2, cfg.decoder_hidden),
                                 nn.SiLU(), nn.Linear(cfg.decoder_hidden, cfg.latent_dim))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.out(self.features(x))  # (B, C, H, W) -> (B, d)


class Decoder(nn.Module):
    def __init__(self, cfg: ModelConfig):
        super().__init__()
        w = cfg.widths[::-1]
        self.bottom, self.top_width = cfg.bottom, w[0]
        self.inp = nn.Sequential(nn.Linear(cfg.latent_dim, cfg.decoder_hidden), nn.SiLU(),
                                 nn.Linear(cfg.decoder_hidden, cfg.decoder_hidden), nn.SiLU(),
                                 nn.Linear(cfg.decoder_hidden, w[0] * cfg.bottom ** 2), nn.SiLU())
        layers: list[nn.Module] = []
        size = cfg.bottom
        for a, b in zip(w[:-1], w[1:]):
            # transposed convolution: a quarter of the cost of upsample + 3x3 conv on a CPU; the
            # 3x3 refinements at the small sizes, where they are cheap, smooth its checkerboard
            size *= 2
            layers += [nn.ConvTranspose2d(a, b, 4, stride=2, padding=1), nn.SiLU()]
            if size <= cfg.refine_upto:
                layers += [nn.Conv2d(b, b, 3, padding=1), nn.SiLU()]
        layers += [nn.ConvTranspose2d(w[-1], cfg.channels, 4, stride=2, padding=1)]
        self.body = nn.Sequential(*layers)

    def forward(self, z: torch.Tensor) -> torch.Tensor:
        h = self.inp(z).view(-1, self.top_width, self.bottom, self.bottom)  # (B, W, 4, 4)
        return torch.sigmoid(self.body(h))  # (B, C, H, W) in [0, 1]


class Autoencoder(nn.Module):
    """Encoder, decoder and the two heads: settings -> code and code -> settings features."""

    def __init__(self, cfg: ModelConfig):
        super().__init__()
        self.cfg = cfg
        self.encoder = Encoder(cfg)
        self.decoder = Decoder(cfg)
        self.to_code = _mlp(cfg.feature_dim, cfg.head_hidden, cfg.latent_dim)
        self.to_features = _mlp(cfg.latent_dim, cfg.head_hidden, cfg.feature_dim)

    def forward(self, x: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        z = self.encoder(x)
        return z, self.decoder(z)
