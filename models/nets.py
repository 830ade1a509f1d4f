"""Networks: a convolutional autoencoder plus two small heads, all built from one `ModelConfig`.

Images are (B, C, H, W) float tensors in [0, 1]; codes are (B, d); settings features are (B, F)
(cos/sin per periodic parameter, [-1, 1] otherwise; see `ParamSpace.features`).
"""
from __future__ import annotations

import copy
import math
from dataclasses import dataclass

import torch
from torch import nn

from .config import Stored


@dataclass
class ModelConfig(Stored):
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


# ConvTranspose2d(kernel 4, stride 2, padding 1) as a 3x3 convolution with four times the output
# channels followed by a pixel shuffle: output row 2m + a reads input rows m - 1, m, m + 1 through
# transposed taps {3, 1, -} (a = 0) or {-, 2, 0} (a = 1); columns likewise.
_SUBPIXEL_TAPS = {0: {0: 3, 1: 1}, 1: {1: 2, 2: 0}}  # phase -> {3x3 index: transposed tap}


def subpixel_conv(layer: nn.ConvTranspose2d) -> nn.Sequential:
    """The same map as `layer` (kernel 4, stride 2, padding 1), as Conv2d(3x3) + PixelShuffle(2)."""
    if (layer.kernel_size, layer.stride, layer.padding, layer.output_padding, layer.groups, layer.dilation) != \
            ((4, 4), (2, 2), (1, 1), (0, 0), 1, (1, 1)):
        raise ValueError("subpixel_conv: only kernel 4, stride 2, padding 1 transposed convolutions convert")
    w = layer.weight.detach()  # (in, out, 4, 4)
    cin, cout = w.shape[:2]
    k = torch.zeros(cout, 2, 2, cin, 3, 3, dtype=w.dtype)
    for a, rows in _SUBPIXEL_TAPS.items():
        for b, cols in _SUBPIXEL_TAPS.items():
            for jy, ky in rows.items():
                for jx, kx in cols.items():
                    k[:, a, b, :, jy, jx] = w[:, :, ky, kx].T
    conv = nn.Conv2d(cin, 4 * cout, 3, padding=1, bias=layer.bias is not None)
    with torch.no_grad():
        conv.weight.copy_(k.reshape(4 * cout, cin, 3, 3))
        if layer.bias is not None:
            conv.bias.copy_(layer.bias.detach().repeat_interleave(4))
    return nn.Sequential(conv, nn.PixelShuffle(2))


def inference_copy(model: Autoencoder) -> Autoencoder:
    """A copy for serving: same outputs (to float rounding), faster on a CPU.

    The decoder's last transposed convolution (few output channels, where the CPU kernels are
    slowest) becomes its sub-pixel equivalent, and the convolutions run channels-last; measured
    about 25% less decode time at 64 px (bench/RESULTS.md). The weights on disk do not change.
    """
    fast = copy.deepcopy(model).eval()
    last = len(fast.decoder.body) - 1
    if isinstance(fast.decoder.body[last], nn.ConvTranspose2d):
        fast.decoder.body[last] = subpixel_conv(fast.decoder.body[last])
    fast.encoder.to(memory_format=torch.channels_last)
    fast.decoder.to(memory_format=torch.channels_last)
    for p in fast.parameters():
        p.requires_grad_(False)
    return fast
