"""The LeNet encoder's layer sizes on the two digit shapes the benchmarks use: 28×28 grey (MNIST, USPS resized) and
32×32 RGB (SVHN, MNIST resized and repeated to three channels)."""
import torch

from adaptkit.nets import build_encoder, feature_size


def conv_out(n, k, stride=1, padding=0):
    # output side of a convolution or pooling: floor((n + 2p − k) / s) + 1 (torch.nn.Conv2d / MaxPool2d docs, "Shape")
    return (n + 2 * padding - k) // stride + 1


def lenet_flat(channels, side, c2=50):
    s = conv_out(conv_out(conv_out(conv_out(side, 5), 2, stride=2), 5), 2, stride=2)
    return c2 * s * s


def test_lenet_on_28_grey_and_32_rgb_gives_500_features_from_800_and_1250_flat():
    torch.manual_seed(0)
    for shape, flat in (((1, 28, 28), 800), ((3, 32, 32), 1250)):
        assert lenet_flat(shape[0], shape[1]) == flat  # the docstring's figures follow from the formula above
        enc = build_encoder("lenet", shape)
        assert enc.fc[0].in_features == flat and enc.fc[0].out_features == 500
        assert enc.conv[0].in_channels == shape[0] and enc.conv[0].out_channels == 20
        assert enc.conv[3].out_channels == 50
        assert feature_size(enc, shape) == 500
        assert enc(torch.randn(3, *shape)).shape == (3, 500)


def test_lenet_widths_are_options_and_a_flat_input_is_reshaped():
    enc = build_encoder("lenet", (28 * 28,), channels=[6, 16], features=84)
    assert enc.fc[0].in_features == lenet_flat(1, 28, c2=16) and enc.out_features == 84
    x = torch.randn(2, 1, 28, 28)
    assert torch.equal(enc(x.reshape(2, -1)), enc(x))  # a flat row is the same image
