"""The serving copy of a model: exact sub-pixel form of the transposed convolution."""
import numpy as np
import pytest
import torch
from torch import nn

from geotween.models.nets import Autoencoder, ModelConfig, inference_copy, subpixel_conv


@pytest.mark.parametrize("cin,cout,size", [(16, 1, 8), (8, 3, 5), (32, 16, 4)])
def test_subpixel_conv_equals_torchs_transposed_convolution(cin, cout, size):
    # Reference: PyTorch's own ConvTranspose2d (kernel 4, stride 2, padding 1), random weights.
    torch.manual_seed(cin + cout)
    layer = nn.ConvTranspose2d(cin, cout, 4, stride=2, padding=1)
    x = torch.randn(3, cin, size, size)
    with torch.no_grad():
        want = layer(x)
        got = subpixel_conv(layer)(x)
    assert got.shape == want.shape == (3, cout, 2 * size, 2 * size)
    assert torch.allclose(got, want, atol=1e-5)


def test_subpixel_conv_refuses_other_shapes():
    with pytest.raises(ValueError, match="kernel 4, stride 2, padding 1"):
        subpixel_conv(nn.ConvTranspose2d(4, 4, 3, stride=2, padding=1))


@pytest.mark.parametrize("channels", [1, 3])
def test_inference_copy_gives_the_same_codes_and_images(channels):
    torch.manual_seed(0)
    model = Autoencoder(ModelConfig(resolution=32, channels=channels, latent_dim=3)).eval()
    fast = inference_copy(model)
    x = torch.rand(5, channels, 32, 32)
    z = torch.randn(5, 3)
    with torch.inference_mode():
        assert torch.allclose(fast.encoder(x), model.encoder(x), atol=1e-5)
        assert torch.allclose(fast.decoder(z), model.decoder(z), atol=1e-5)
    # the original is untouched: its last layer is still the transposed convolution
    assert isinstance(model.decoder.body[-1], nn.ConvTranspose2d)
    assert not isinstance(fast.decoder.body[-1], nn.ConvTranspose2d)
    assert np.all([not p.requires_grad for p in fast.parameters()])
