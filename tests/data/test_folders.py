"""Image folders on disk: tiny PNGs written with PIL are read back on one input shape, labelled by class folder
(sorted names, torchvision's ImageFolder convention) or unlabelled when flat; a class the source lacks is refused."""
import re

import pytest
import torch
from PIL import Image

from adaptkit import fit
from adaptkit.data import UNLABELLED
from adaptkit.data.folders import image_folder_pair, image_transform, read_image_folder

ORANGE = (200, 100, 50)
# PIL's "L" conversion is ITU-R 601-2 luma: L = R·299/1000 + G·587/1000 + B·114/1000 (PIL's Image.convert docs)
ORANGE_LUMA = (200 * 299 + 100 * 587 + 50 * 114) / 1000  # 124.2


def png(path, colour, size=(20, 20), mode="RGB"):
    path.parent.mkdir(parents=True, exist_ok=True)
    Image.new(mode, size, colour).save(path)


@pytest.fixture
def folders(tmp_path):
    src, tgt = tmp_path / "source", tmp_path / "target"
    for i in range(4):
        png(src / "dog" / f"{i}.png", ORANGE)  # written first, sorted second: labels follow names, not order
        png(src / "cat" / f"{i}.png", 90, size=(24, 18), mode="L")  # grey, another shape
    for i in range(5):
        png(tgt / f"t{i}.png", ORANGE, size=(40, 30))  # flat: an unlabelled target
    return src, tgt


def test_a_folder_pair_is_read_on_one_shape_with_sorted_class_labels_and_an_unlabelled_flat_target(folders):
    src, tgt = folders
    pair = image_folder_pair(src, tgt, size=16, channels=3, source_val_fraction=0.25, target_test_fraction=0.2)
    assert pair.input_shape == (3, 16, 16) and pair.n_classes == 2
    assert not pair.has_target_labels and len(pair.target_train_x) + len(pair.target_test_x) == 5
    x, y = pair.source_train.x, pair.source_train.y
    dogs, cats = x[y == 1], x[y == 0]  # 'cat' < 'dog'
    # a uniform image stays uniform under resizing: each channel is its 8-bit value / 255 (ToTensor's scaling)
    assert torch.allclose(dogs, torch.tensor(ORANGE).float().div(255).view(1, 3, 1, 1).expand_as(dogs), atol=1e-6)
    assert torch.allclose(cats, torch.full_like(cats, 90 / 255), atol=1e-6)  # grey repeated to R, G and B
    run = fit(pair, method="dann", encoder="small_cnn", steps=2, batch_size=4, eval_every=2, progress=False,
              device="cpu")  # what was read trains as it is
    assert run.summary["steps"] == 2


def test_rgb_to_grey_follows_pil_luma_and_resizes(folders):
    src, _ = folders
    x, y, names = read_image_folder(src, image_transform((12, 10), channels=1))
    assert names == ["cat", "dog"] and x.shape == (8, 1, 12, 10) and sorted(y.tolist()) == [0] * 4 + [1] * 4
    assert torch.allclose(x[y == 1], torch.full((4, 1, 12, 10), round(ORANGE_LUMA) / 255), atol=1e-6)


def test_a_labelled_target_keeps_the_source_class_indices_and_a_foreign_class_is_refused(folders, tmp_path):
    src, _ = folders
    tgt = tmp_path / "labelled"
    for i in range(3):
        png(tgt / "dog" / f"{i}.png", ORANGE)  # only 'dog': index 1 in the source, though 0 in its own folder
    x, y, _ = read_image_folder(tgt, image_transform(8), classes=["cat", "dog"])
    assert y.tolist() == [1, 1, 1]
    pair = image_folder_pair(src, tgt, size=8, target_test_fraction=0.5)
    assert pair.has_target_labels and pair.scoring_sets()["target_test"].y.unique().tolist() == [1]
    png(tgt / "bird" / "0.png", ORANGE)
    with pytest.raises(ValueError, match=re.escape("has class folder(s) ['bird'] that the source lacks; the "
                                                   "source's classes are ['cat', 'dog']")):
        image_folder_pair(src, tgt, size=8)


def test_unusable_folders_are_refused_naming_the_folder(folders, tmp_path):
    src, tgt = folders
    with pytest.raises(ValueError, match=re.escape(f"source image folder {str(tgt)!r} has no class sub-folders")):
        image_folder_pair(tgt, src)
    with pytest.raises(ValueError, match=re.escape(f"target image folder {str(tmp_path / 'nowhere')!r} is not a "
                                                   "folder")):
        image_folder_pair(src, tmp_path / "nowhere")
    empty = tmp_path / "empty"
    empty.mkdir()
    with pytest.raises(ValueError, match="holds no class sub-folders and no images"):
        image_folder_pair(src, empty)
    with pytest.raises(ValueError, match=re.escape("The 'channels' parameter of image_transform must be one of "
                                                   "{1, 3}. Got 2 instead.")):
        image_folder_pair(src, tgt, channels=2)


def test_normalisation_is_per_channel_x_minus_mean_over_std(folders):
    src, _ = folders
    mean, std = (0.485, 0.456, 0.406), (0.229, 0.224, 0.225)
    x, y, _ = read_image_folder(src, image_transform(8, 3, mean, std))
    want = (torch.tensor(ORANGE).float() / 255 - torch.tensor(mean)) / torch.tensor(std)  # the formula, by hand
    assert torch.allclose(x[y == 1], want.view(1, 3, 1, 1).expand(4, 3, 8, 8), atol=1e-5)
    with pytest.raises(ValueError, match=re.escape("'mean' parameter of image_transform must hold one value per "
                                                   "channel (1)")):
        image_transform(8, 1, mean, std)
    with pytest.raises(ValueError, match="needs both 'mean' and 'std'"):
        image_transform(8, 3, mean=mean)


def test_the_imagenet_statistics_are_those_of_torchvisions_pretrained_weights():
    import torchvision

    from adaptkit.data import IMAGENET_MEAN, IMAGENET_STD

    preset = torchvision.models.ResNet18_Weights.IMAGENET1K_V1.transforms()  # metadata only: nothing downloads
    assert list(IMAGENET_MEAN) == list(preset.mean) and list(IMAGENET_STD) == list(preset.std)


# -- data=image_folders: the same reader as a data choice of the commands ------------------------------------------
def test_the_image_folders_data_choice_reads_what_image_folder_pair_reads(folders):
    from adaptkit.data import make_shift

    src, tgt = folders
    pair = make_shift("image_folders", source=str(src), target=str(tgt), size=8, channels=1, seed=3)
    same = image_folder_pair(src, tgt, size=8, channels=1, split_seed=3)
    assert pair.name == "image_folders" and pair.input_shape == (1, 8, 8)
    assert torch.equal(pair.source_train.x, same.source_train.x) and torch.equal(pair.source_train.y, same.source_train.y)
    # RGB orange to grey by PIL's luma, L = R·299/1000 + G·587/1000 + B·114/1000 (PIL's Image.convert docs)
    assert torch.allclose(pair.target_train_x, torch.full_like(pair.target_train_x, round(ORANGE_LUMA) / 255),
                          atol=1e-6)
    with pytest.raises(ValueError, match=re.escape("data source 'image_folders' needs data.source")):
        make_shift("image_folders", target=str(tgt))


def test_the_cli_trains_on_image_folders_and_refuses_a_missing_one_before_writing(folders, tmp_path, monkeypatch,
                                                                                  capsys):
    import json

    from .helpers import train_cli

    src, tgt = folders
    run_dir = tmp_path / "run"
    code, out, err = train_cli(["data=image_folders", f"data.source={src}", f"data.target={tgt}", "data.size=16",
                                "encoder=small_cnn", "steps=2", "batch_size=3", "eval_every=2", "diagnostics=false",
                                f"run_dir={run_dir}"], monkeypatch, capsys)
    assert code == 0, err
    assert "on image_folders seed 0" in out and "target accuracy unknown" in out  # a flat target has no labels
    assert json.loads((run_dir / "summary.json").read_text())["input_shape"] == [3, 16, 16]
    other = tmp_path / "run2"
    code, _, err = train_cli(["data=image_folders", f"data.source={src}", f"data.target={tmp_path / 'nowhere'}",
                              "steps=2", f"run_dir={other}"], monkeypatch, capsys)
    assert code == 2 and len(err.strip().splitlines()) == 1
    assert f"target image folder {str(tmp_path / 'nowhere')!r} is not a folder" in err and not other.exists()
