"""The digit benchmarks' own files (adaptkit.data.digits_files): tiny files are written in each format here with
numpy, bz2 and scipy — MNIST's IDX (big-endian header, magic 2051 for images and 2049 for labels), USPS's LIBSVM
lines in bz2, SVHN's .mat with 'X' (32, 32, 3, N) and 'y' (10 meaning the digit 0) — and read back through
torchvision's dataset classes; the pixels and labels are compared with what was written. Nothing downloads."""
import bz2
import json
import re

import numpy as np
import pytest
import scipy.io
import torch
from PIL import Image

from adaptkit.data import MissingDataFile, digit_pair, image_transform, make_shift, read_digits

from .helpers import train_cli

MNIST_FILES = ["train-images-idx3-ubyte", "train-labels-idx1-ubyte", "t10k-images-idx3-ubyte", "t10k-labels-idx1-ubyte"]
USPS_LEVELS = np.array([-1.0, -0.5, 0.0, 0.5, 1.0])  # exact in binary: the [-1, 1] grey levels of LIBSVM's USPS


def write_idx(path, array, magic):
    # IDX (the MNIST database's format): a big-endian int32 magic number (0x00000803 = 2051 for uint8 images of
    # 3 dimensions, 0x00000801 = 2049 for uint8 labels of 1), one big-endian int32 per dimension, then the bytes
    path.parent.mkdir(parents=True, exist_ok=True)
    header = np.array([magic, *array.shape], dtype=">i4").tobytes()
    path.write_bytes(header + np.ascontiguousarray(array, dtype=np.uint8).tobytes())


def write_mnist(root, n_train=30, n_test=10, seed=0):
    rng = np.random.default_rng(seed)
    out = {}
    for prefix, n in (("train", n_train), ("t10k", n_test)):
        images = rng.integers(0, 256, size=(n, 28, 28), dtype=np.uint8)
        labels = (np.arange(n) % 10).astype(np.uint8)  # every digit present
        write_idx(root / "MNIST" / "raw" / f"{prefix}-images-idx3-ubyte", images, 2051)
        write_idx(root / "MNIST" / "raw" / f"{prefix}-labels-idx1-ubyte", labels, 2049)
        out[prefix] = (images, labels)
    return out


def write_usps(root, n=30, seed=1, name="usps.bz2"):
    # LIBSVM's sparse format, one digit a line: "<label> 1:<v1> 2:<v2> … 256:<v256>", labels 1..10 for digits
    # 0..9, grey levels in [-1, 1] (LIBSVM multi-class data sets, usps)
    rng = np.random.default_rng(seed)
    values = rng.choice(USPS_LEVELS, size=(n, 256))
    digits = np.arange(n) % 10
    lines = [f"{d + 1} " + " ".join(f"{j + 1}:{v:g}" for j, v in enumerate(row)) for d, row in zip(digits, values)]
    root.mkdir(parents=True, exist_ok=True)
    (root / name).write_bytes(bz2.compress(("\n".join(lines) + "\n").encode()))
    return values.reshape(n, 16, 16), digits


def write_svhn(root, n=30, seed=2, name="train_32x32.mat"):
    rng = np.random.default_rng(seed)
    x = rng.integers(0, 256, size=(32, 32, 3, n), dtype=np.uint8)  # (H, W, C, N): SVHN's own layout
    digits = np.arange(n) % 10
    y = np.where(digits == 0, 10, digits).reshape(n, 1).astype(np.uint8)  # SVHN's files label the digit 0 as 10
    root.mkdir(parents=True, exist_ok=True)
    scipy.io.savemat(str(root / name), {"X": x, "y": y})
    return x, digits


def test_mnist_idx_files_read_back_pixel_for_pixel(tmp_path):
    written = write_mnist(tmp_path)
    for split, prefix in (("train", "train"), ("test", "t10k")):
        images, labels = written[prefix]
        x, y = read_digits("mnist", tmp_path, split, image_transform(28, channels=1))
        assert x.shape == (len(images), 1, 28, 28) and x.dtype == torch.float32
        # ToTensor scales 8-bit values by 1/255 (torchvision's docs)
        np.testing.assert_allclose(x[:, 0].numpy(), images / 255.0, atol=1e-7)
        np.testing.assert_array_equal(y.numpy(), labels)


def test_usps_bz2_lines_read_back_with_torchvisions_grey_scaling(tmp_path):
    values, digits = write_usps(tmp_path)
    x, y = read_digits("usps", tmp_path, "train", image_transform(16, channels=1))
    # torchvision's USPS stores (v + 1) / 2 · 255 as uint8 (truncated); the levels written are exact in binary
    expected = np.floor((values + 1) / 2 * 255) / 255
    np.testing.assert_allclose(x[:, 0].numpy(), expected, atol=1e-7)
    np.testing.assert_array_equal(y.numpy(), digits)  # LIBSVM's labels 1..10 are the digits 0..9


def test_svhn_mat_reads_back_with_label_10_as_digit_0(tmp_path):
    X, digits = write_svhn(tmp_path)
    x, y = read_digits("svhn", tmp_path, "train", image_transform(32, channels=3), verify=False)
    assert x.shape == (X.shape[3], 3, 32, 32)
    # X[h, w, c, n] is pixel (h, w) of channel c of image n (SVHN's .mat layout)
    np.testing.assert_allclose(x.numpy(), X.transpose(3, 2, 0, 1) / 255.0, atol=1e-7)
    np.testing.assert_array_equal(y.numpy(), digits)
    assert (y == 0).sum() == 3  # the three images labelled 10 in the file


def test_svhn_checks_torchvisions_checksum_unless_told_not_to(tmp_path):
    write_svhn(tmp_path)  # a tiny file cannot have the real file's MD5
    with pytest.raises(ValueError, match=re.escape("does not match the MD5 checksum torchvision records for it "
                                                   "(e26dedcc434d2e4c54c9b2d4a06d8373)")):
        read_digits("svhn", tmp_path, "train", image_transform(32, channels=3))


def test_a_pair_puts_both_domains_on_one_shape_with_pils_resize_and_grey_to_rgb(tmp_path):
    written = write_mnist(tmp_path)
    X, _ = write_svhn(tmp_path)
    pair = digit_pair("svhn", "mnist", tmp_path, size=32, channels=3, verify=False, target_test_fraction=0.0)
    assert pair.input_shape == (3, 32, 32) and pair.n_classes == 10
    images = written["train"][0]
    # the target: each MNIST digit resized 28 → 32 by PIL's bilinear filter (what torchvision's Resize calls on a
    # PIL image), its grey repeated to R, G and B
    ref = np.stack([np.asarray(Image.fromarray(im).resize((32, 32), Image.BILINEAR)) for im in images]) / 255.0
    got = pair.target_train_x.numpy()
    assert got.shape == (30, 3, 32, 32)
    for c in range(3):
        np.testing.assert_allclose(got[:, c], ref, atol=1e-6)
    src = torch.cat([pair.source_train.x, pair.source_val.x]).numpy()
    as_bytes = lambda a: sorted(im.tobytes() for im in a)  # noqa: E731
    # the source: every SVHN image once, pixel for pixel (32×32 already: no resize)
    assert as_bytes(np.round(src * 255).astype(np.uint8)) == as_bytes(X.transpose(3, 2, 0, 1))


def test_normalisation_and_a_seeded_subset(tmp_path):
    written = write_mnist(tmp_path)
    x, y = read_digits("mnist", tmp_path, "train", image_transform(28, 1, mean=[0.5], std=[0.25]), limit=12, seed=4)
    images, labels = written["train"]
    raw = x[:, 0].numpy() * 0.25 + 0.5  # undo (x − mean) / std (torchvision's Normalize docs)
    rows = {im.tobytes(): i for i, im in enumerate(images)}
    picked = [rows[np.round(r * 255).astype(np.uint8).tobytes()] for r in raw]  # each is one written image ...
    assert len(set(picked)) == 12 and picked == sorted(picked)  # ... drawn without replacement, in file order
    np.testing.assert_array_equal(y.numpy(), labels[picked])
    again, _ = read_digits("mnist", tmp_path, "train", image_transform(28, 1, mean=[0.5], std=[0.25]), limit=12, seed=4)
    assert torch.equal(x, again)


@pytest.mark.parametrize("name, split, missing, folder", [
    ("mnist", "train", "train-images-idx3-ubyte", "MNIST/raw"),
    ("usps", "test", "usps.t.bz2", ""),
    ("svhn", "test", "test_32x32.mat", ""),
])
def test_a_missing_file_names_the_file_the_folder_and_how_to_get_it(tmp_path, name, split, missing, folder):
    with pytest.raises(MissingDataFile) as e:
        read_digits(name, tmp_path, split)
    msg = str(e.value)
    assert "\n" not in msg and isinstance(e.value, FileNotFoundError) and isinstance(e.value, ValueError)
    assert f"file {missing!r} not found in {str(tmp_path / folder) if folder else str(tmp_path)!r}" in msg
    assert f"torchvision.datasets.{name.upper()}(root={str(tmp_path)!r}, download=True)" in msg
    assert "adaptkit never downloads" in msg
    if name == "mnist":
        assert all(f in msg for f in MNIST_FILES)  # torchvision checks all four, whichever split is read


def test_mnist_needs_all_four_files_as_torchvision_does(tmp_path):
    write_mnist(tmp_path)
    (tmp_path / "MNIST" / "raw" / "t10k-labels-idx1-ubyte").unlink()
    with pytest.raises(MissingDataFile, match=re.escape("file 't10k-labels-idx1-ubyte' not found")):
        read_digits("mnist", tmp_path, "train")


def test_the_ready_pairs_put_both_domains_on_their_documented_shape(tmp_path):
    write_mnist(tmp_path)
    write_usps(tmp_path)
    write_svhn(tmp_path)
    for name, shape in (("mnist_usps", (1, 28, 28)), ("usps_mnist", (1, 28, 28)), ("svhn_mnist", (3, 32, 32))):
        pair = make_shift(name, root=str(tmp_path), verify=False)
        assert pair.name == name and pair.input_shape == shape and pair.n_classes == 10 and pair.has_target_labels
    # USPS's 16×16 digits as MNIST's 28×28: PIL's bilinear resize of what torchvision's USPS holds
    values, _ = write_usps(tmp_path / "alone")
    stored = np.floor((values + 1) / 2 * 255).astype(np.uint8)  # torchvision's USPS conversion, as above
    ref = np.stack([np.asarray(Image.fromarray(im).resize((28, 28), Image.BILINEAR)) for im in stored]) / 255.0
    x, _ = read_digits("usps", tmp_path / "alone", "train", image_transform(28, channels=1))
    np.testing.assert_allclose(x[:, 0].numpy(), ref, atol=1e-6)


def test_a_ready_pair_without_root_says_to_set_it():
    with pytest.raises(ValueError, match=re.escape("needs data.root")):
        make_shift("usps_mnist")


# -- the command line -------------------------------------------------------------------------------------------
def test_the_cli_trains_mnist_to_usps_on_tiny_files_with_the_lenet_encoder(tmp_path, monkeypatch, capsys):
    write_mnist(tmp_path / "digits")
    write_usps(tmp_path / "digits")
    run_dir = tmp_path / "run"
    code, out, err = train_cli(["data=mnist_usps", f"data.root={tmp_path / 'digits'}", "encoder=lenet",
                                "method=dann", "steps=2", "batch_size=8", "eval_every=2", "diagnostics=false",
                                f"run_dir={run_dir}"], monkeypatch, capsys)
    assert code == 0, err
    assert "on mnist_usps seed 0" in out and (run_dir / "summary.json").is_file()
    summary = json.loads((run_dir / "summary.json").read_text())
    assert summary["steps"] == 2 and summary["input_shape"] == [1, 28, 28]  # USPS resized to MNIST's 28×28


def test_the_cli_refuses_missing_files_in_one_line_before_writing_anything(tmp_path, monkeypatch, capsys):
    run_dir = tmp_path / "run"
    code, out, err = train_cli(["data=svhn_mnist", f"data.root={tmp_path}", "steps=2", f"run_dir={run_dir}"],
                               monkeypatch, capsys)
    assert code == 2 and len(err.strip().splitlines()) == 1
    assert "SVHN file 'train_32x32.mat' not found in" in err and str(tmp_path) in err
    assert not run_dir.exists()
    code, _, err = train_cli(["data=usps_mnist", "steps=2", f"run_dir={run_dir}"], monkeypatch, capsys)
    assert code == 2 and "needs data.root" in err and not run_dir.exists()
