"""The torchvision ResNet encoders: a CPU step through fit, the feature width, freezing, the backbone's lower
learning rate, and weights from a local file (checked against torchvision's own network; a mismatch refused)."""
import re

import numpy as np
import pytest
import torch
import torchvision

from adaptkit import DomainPair, fit
from adaptkit.methods import SetupInfo, build_method
from adaptkit.nets import AdaptedModel, LinearHead, ResNet18, build_encoder
from adaptkit.data.batches import PairedBatches
from adaptkit.train.evaluate import Evaluator
from adaptkit.train.loop import Trainer
from adaptkit.train.optim import OptimSettings


def image_pair(n=24, channels=3, side=32, seed=0):
    """A tiny two-class image pair: class 1 is brighter; the target is a darker copy of the same task."""
    rng = np.random.default_rng(seed)
    ys, yt = np.arange(n) % 2, np.arange(n) % 2
    xs = rng.random((n, channels, side, side)).astype(np.float32) * 0.5 + 0.5 * ys[:, None, None, None]
    xt = 0.8 * (rng.random((n, channels, side, side)).astype(np.float32) * 0.5 + 0.5 * yt[:, None, None, None])
    return DomainPair(xs, ys, xt, yt, name="tiny_images", source_val_fraction=0.25, target_test_fraction=0.25)


def tv_features(arch, state, x):
    """torchvision's own network with ``state`` loaded, its classifier removed: the reference features."""
    net = getattr(torchvision.models, arch)(weights=None)
    net.load_state_dict(state)
    net.fc = torch.nn.Identity()
    with torch.no_grad():
        return net.eval()(x)


def test_resnet18_without_weights_runs_a_cpu_step_on_32px_rgb_images_through_fit():
    torch.manual_seed(0)
    run = fit(image_pair(), method="dann", encoder="resnet18", encoder_options={"bottleneck": 16}, steps=2,
              batch_size=4, eval_every=2, progress=False, device="cpu")
    assert run.summary["steps"] == 2 and 0.0 <= run.summary["target_accuracy"] <= 1.0
    assert run.model.encoder.out_features == 16


@pytest.mark.parametrize("arch, pooled", [("resnet18", 512), ("resnet50", 2048)])
def test_out_features_is_the_bottleneck_width_or_torchvision_pooled_width(arch, pooled):
    # the pooled width is torchvision's own classifier's input width (fc.in_features), not a number of ours
    assert getattr(torchvision.models, arch)(weights=None).fc.in_features == pooled
    x = torch.randn(2, 3, 16, 16)
    for bottleneck, width in ((0, pooled), (24, 24)):
        enc = build_encoder(arch, (3, 16, 16), bottleneck=bottleneck)
        assert enc.out_features == width and enc.eval()(x).shape == (2, width)


def test_grey_images_are_read_as_the_same_image_in_three_channels():
    torch.manual_seed(0)
    grey, rgb = ResNet18((1, 16, 16)).eval(), ResNet18((3, 16, 16)).eval()
    rgb.load_state_dict(grey.state_dict())
    x = torch.rand(3, 1, 16, 16)
    with torch.no_grad():
        assert torch.equal(grey(x), rgb(x.repeat(1, 3, 1, 1)))  # torch.Tensor.repeat: a real 3-channel copy


def test_freeze_keeps_the_backbone_bit_identical_while_the_bottleneck_and_head_move():
    torch.manual_seed(0)
    enc = ResNet18((3, 32, 32), bottleneck=8, freeze=True)
    head = LinearHead(8, 2)
    back = {k: v.clone() for k, v in enc.backbone.state_dict().items()}  # weights AND batch-norm statistics
    neck = [p.detach().clone() for p in enc.bottleneck.parameters()]
    h0 = [p.detach().clone() for p in head.parameters()]
    fit(image_pair(), method="source_only", encoder=enc, head=head, steps=3, batch_size=4, eval_every=3,
        progress=False, device="cpu")
    assert all(torch.equal(back[k], v) for k, v in enc.backbone.state_dict().items())
    assert all(not p.requires_grad for p in enc.backbone.parameters())
    assert any(not torch.equal(a, b) for a, b in zip(neck, enc.bottleneck.parameters()))
    assert any(not torch.equal(a, b) for a, b in zip(h0, head.parameters()))


def test_backbone_lr_scale_gives_the_backbone_its_share_of_the_learning_rate_at_every_step():
    torch.manual_seed(0)
    pair = image_pair(n=16, side=16)
    enc = ResNet18(pair.input_shape, bottleneck=8, backbone_lr_scale=0.1)
    model = AdaptedModel(enc, LinearHead(8, 2), 8, 2)
    method = build_method("source_only")
    method.attach(model, SetupInfo(8, 2, pair.input_shape, batch_size=4, steps=4))
    lr = 0.05
    tr = Trainer(model, method, PairedBatches(pair.training_data(), 4, 0), steps=4,
                 optim=OptimSettings(lr=lr, momentum=0.0, schedule="cosine"),
                 evaluate=Evaluator(pair.scoring_sets(), pair.target_train_x), eval_every=4, handle_signals=False)
    tr._enter_stage_for(0)
    groups = tr.optimizers[0].param_groups
    backbone = {id(p) for p in enc.backbone.parameters()}
    by_id = {id(p): g["lr"] for g in groups for p in g["params"]}
    assert all(by_id[id(p)] == pytest.approx(lr * 0.1) for p in enc.backbone.parameters())
    others = [p for p in model.parameters() if id(p) not in backbone]
    assert others and all(by_id[id(p)] == pytest.approx(lr) for p in others)
    tr.run()
    # the schedule scales both rates alike: after the last step, backbone / head = 0.1 still
    lrs = sorted(g["lr"] for g in tr.optimizers[0].param_groups)
    assert lrs[0] == pytest.approx(0.1 * lrs[1]) and lrs[1] < lr
    # plain SGD (no momentum, no decay): a step moves a weight by −lr·grad (torch.optim.SGD's update rule), so the
    # backbone moves by a tenth of what the run's rate would move it; the gradient is from torch.autograd
    w = enc.backbone.conv1.weight
    x, y = pair.source_train.x[:4], pair.source_train.y[:4]
    opt = tr.optimizers[0]
    opt.zero_grad()
    model.train()
    torch.nn.functional.cross_entropy(model.head(enc(x)), y).backward()
    before, g = w.detach().clone(), w.grad.detach().clone()
    rate = next(gr["lr"] for gr in opt.param_groups if any(p is w for p in gr["params"]))
    opt.step()
    moved = w.detach() - before  # float32 weights near 0.05: a difference carries ~1e-8 of rounding
    assert torch.allclose(moved, -rate * g, rtol=1e-4, atol=1e-7)
    assert not torch.allclose(moved, -10 * rate * g, rtol=1e-1, atol=1e-7)  # not the head's (run's) rate
    assert rate == pytest.approx(0.1 * max(gr["lr"] for gr in opt.param_groups))


def _scaled_trainer(pair, seed, steps=4):
    torch.manual_seed(seed)
    enc = ResNet18(pair.input_shape, bottleneck=8, backbone_lr_scale=0.1)
    model = AdaptedModel(enc, LinearHead(8, 2), 8, 2)
    method = build_method("source_only")
    method.attach(model, SetupInfo(8, 2, pair.input_shape, batch_size=4, steps=steps))
    return Trainer(model, method, PairedBatches(pair.training_data(), 4, 0), steps=steps,
                   optim=OptimSettings(lr=0.05, schedule="cosine"), meta={"config_hash": "x"},
                   evaluate=Evaluator(pair.scoring_sets(), pair.target_train_x), eval_every=4, handle_signals=False)


def test_a_run_with_a_lower_backbone_rate_resumes_to_the_uninterrupted_result():
    # the groups' rates and scales travel in the checkpoint and pass its plausibility checks
    pair = image_pair(n=16, side=16)
    full = _scaled_trainer(pair, 0)
    full.run()
    part = _scaled_trainer(pair, 0)
    part.run(until=2)
    resumed = _scaled_trainer(pair, 5)  # another init: everything must come from the state
    resumed.load_state_dict(part.state_dict())
    resumed.run()
    for (k, a), (_, b) in zip(full.model.state_dict().items(), resumed.model.state_dict().items()):
        assert torch.equal(a, b), k


@pytest.mark.parametrize("arch", ["resnet18", "resnet50"])
def test_a_weights_file_from_torchvision_loads_and_reproduces_its_features_exactly(arch, tmp_path):
    torch.manual_seed(1)
    state = getattr(torchvision.models, arch)(weights=None).state_dict()  # fc.* included, as in a real download
    path = tmp_path / f"{arch}.pt"
    torch.save(state, path)
    torch.manual_seed(2)  # another init: the features must come from the file
    enc = build_encoder(arch, (3, 32, 32), weights_path=str(path)).eval()
    x = torch.randn(2, 3, 32, 32)
    with torch.no_grad():
        assert torch.equal(enc(x), tv_features(arch, state, x))


def test_a_weights_file_that_does_not_match_is_refused_naming_the_file_and_first_key(tmp_path):
    r50 = torchvision.models.resnet50(weights=None).state_dict()
    wrong = tmp_path / "resnet50.pt"
    torch.save(r50, wrong)
    r18_keys = torchvision.models.resnet18(weights=None).state_dict().keys()
    extra_keys = [k for k in r50 if k not in r18_keys and not k.startswith("fc.")]  # ResNet-50's bottleneck blocks
    with pytest.raises(ValueError, match=re.escape(f"weights file {str(wrong)!r} does not match torchvision's "
                                                   f"resnet18: unexpected key {extra_keys[0]!r} (and "
                                                   f"{len(extra_keys) - 1} more)")):
        build_encoder("resnet18", (3, 32, 32), weights_path=str(wrong))
    r18 = torchvision.models.resnet18(weights=None).state_dict()
    r18["layer1.0.conv1.weight"] = torch.zeros(3, 3)
    bent = tmp_path / "bent.pt"
    torch.save(r18, bent)
    with pytest.raises(ValueError, match=re.escape("tensor 'layer1.0.conv1.weight' has shape (3, 3), expected "
                                                   "(64, 64, 3, 3)")):
        build_encoder("resnet18", (3, 32, 32), weights_path=str(bent))
    partial = torchvision.models.resnet18(weights=None).state_dict()
    del partial["bn1.running_mean"]
    torch.save(partial, bent)
    with pytest.raises(ValueError, match=re.escape("missing key 'bn1.running_mean'.")):
        build_encoder("resnet18", (3, 32, 32), weights_path=str(bent))
    extra = dict(torchvision.models.resnet18(weights=None).state_dict(), **{"head.weight": torch.zeros(2)})
    torch.save(extra, bent)
    with pytest.raises(ValueError, match=re.escape("unexpected key 'head.weight'")):
        build_encoder("resnet18", (3, 32, 32), weights_path=str(bent))


def test_a_weights_file_that_is_not_a_safe_state_dict_is_refused_naming_the_file(tmp_path):
    code = tmp_path / "code.pt"
    torch.save({"conv1.weight": np.float64}, code)  # a pickled class: weights_only=True refuses to load it
    with pytest.raises(ValueError, match=re.escape(f"weights file {str(code)!r} for encoder 'resnet18' cannot be "
                                                   "read safely")):
        build_encoder("resnet18", (3, 32, 32), weights_path=str(code))
    listed = tmp_path / "list.pt"
    torch.save([torch.zeros(1)], listed)
    with pytest.raises(ValueError, match=re.escape(f"weights file {str(listed)!r} for encoder 'resnet18' holds a "
                                                   "list, not a state dict")):
        build_encoder("resnet18", (3, 32, 32), weights_path=str(listed))
    with pytest.raises(ValueError, match="names no file"):
        build_encoder("resnet18", (3, 32, 32), weights_path=str(tmp_path / "absent.pt"))


def test_freeze_with_a_backbone_rate_and_unfit_inputs_are_refused():
    with pytest.raises(ValueError, match="'backbone_lr_scale' parameter of encoder 'resnet18' has nothing to scale"):
        build_encoder("resnet18", (3, 32, 32), freeze=True, backbone_lr_scale=0.1)
    for shape in [(2, 32, 32), (3, 8, 8), (3072,)]:
        with pytest.raises(ValueError, match=re.escape(f"got input shape {shape}")):
            build_encoder("resnet18", shape)


@pytest.mark.parametrize("arch, options", [("resnet18", {"bottleneck": 16}), ("resnet50", {})])
def test_memory_sizes_match_the_built_encoder(arch, options):
    cls = build_encoder(arch, (3, 16, 16)).__class__
    n_params, per_sample = cls.memory_sizes((1, 16, 16), options)
    enc = cls((1, 16, 16), **options)
    # torch's own parameter count, less torchvision's ImageNet classifier (fc: pooled × 1000 weights + 1000 biases)
    tv = getattr(torchvision.models, arch)(weights=None)
    full, pooled = sum(p.numel() for p in tv.parameters()), tv.fc.in_features
    neck = sum(p.numel() for p in enc.bottleneck.parameters())
    assert n_params == sum(p.numel() for p in enc.parameters()) == full - (pooled + 1) * 1000 + neck
    kept = []  # every leaf module's output in a real forward pass, counted by hooks
    for m in enc.modules():
        if not list(m.children()):
            m.register_forward_hook(lambda mod, i, out: kept.append(out.numel()))
    enc.train()(torch.zeros(2, 1, 16, 16))
    assert per_sample == sum(kept) // 2
