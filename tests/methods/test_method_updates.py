"""Unit tests of each method's setup, options and updates, without the training loop: build a tiny model, attach the
method, run each update's loss on a hand-made batch and look at the gradients it sends. Tests are named
test_<method>_… so that ``pytest -k dann`` selects one method."""
import copy
import math
import re
from pathlib import Path

import numpy as np
import pytest
import torch
from omegaconf import OmegaConf
from torch import nn

import adaptkit
from adaptkit.data.batches import Batch
from adaptkit.methods import METHODS, Progress, SetupInfo
from adaptkit.nets import AdaptedModel, LinearHead, MLPEncoder, MLPHead

torch.set_num_threads(1)


def _attach(method, head=None, encoder=None, batch_size=8):
    """A tiny model (2 inputs → 4 features → 3 classes) with ``method`` attached. The default head has no dropout,
    so two forward passes agree (ADR's tests pass a head with dropout)."""
    torch.manual_seed(0)
    encoder = encoder or MLPEncoder((2,), hidden=[8], features=4)
    model = AdaptedModel(encoder, head or MLPHead(4, 3, hidden=[8], dropout=0.0), feature_dim=4, n_classes=3)
    method.attach(model, SetupInfo(feature_dim=4, n_classes=3, input_shape=(2,), batch_size=batch_size, steps=10))
    return model


def _batch(n=8, weighted=False):
    g = torch.Generator().manual_seed(1)
    w = torch.rand(n, generator=g) + 0.5 if weighted else None
    return Batch(torch.randn(n, 2, generator=g), torch.randint(0, 3, (n,), generator=g),
                 torch.randn(n, 2, generator=g) + 1.0, w)


def _loss(update, batch, p=0.5):
    out = update.loss(batch, Progress(step=5, stage="train", stage_step=5, p=p))
    assert isinstance(out, tuple) and len(out) == 2 and isinstance(out[1], dict)  # every update: (loss, logs)
    loss, logs = out
    assert loss.ndim == 0 and torch.isfinite(loss)
    assert all(v.numel() == 1 for v in logs.values())
    return loss, logs


def _grads(update, batch, modules, p=0.5):
    """Gradients of ``update``'s loss on every parameter of ``modules`` (None where none flows)."""
    for m in modules:
        m.zero_grad(set_to_none=True)
    _loss(update, batch, p)[0].backward()
    return [q.grad for m in modules for q in m.parameters()]


def _all_have_grads(update, batch, p=0.5):
    grads = _grads(update, batch, update.modules, p)
    return all(g is not None and torch.isfinite(g).all() for g in grads) and any(g.abs().sum() > 0 for g in grads)


def _assert_reversed(g_enc, g_disc, ce, dom, enc, disc, lam):
    """Gradient reversal (Ganin & Lempitsky, ICML 2015) checked against plain autograd of the unreversed losses:
    the encoder receives ∂CE − λ_p·∂domain, the discriminator ∂domain at full strength."""
    d_ce = torch.autograd.grad(ce, enc, retain_graph=True)
    d_dom = torch.autograd.grad(dom, enc + disc)
    for g, gc, gd in zip(g_enc, d_ce, d_dom[:len(enc)]):
        torch.testing.assert_close(g, gc - lam * gd)  # encoder: reversed and scaled by λ_p
    for g, gd in zip(g_disc, d_dom[len(enc):]):
        torch.testing.assert_close(g, gd)  # discriminator: full strength


def _make(name, **options):
    return METHODS.get(name)(**options)


# -- one step's direction -------------------------------------------------------------------------------------
# For every adversarial or min–max update: one plain SGD step (what the loop does, float64 so first-order changes
# are far above round-off) on a fixed batch; the quantity the step minimises must go down, the one it maximises up,
# and only the declared parameters may move. A flipped sign anywhere fails one of these.
def _double(model, method):
    model.double()
    method.double()
    b = _batch()
    return Batch(b.x_src.double(), b.y_src, b.x_tgt.double(), None)


def _zero_last_linear(module):
    """With the head's last weight at 0, the source CE sends no gradient into the features: an encoder step is then
    the alignment term's alone."""
    with torch.no_grad():
        [m for m in module.modules() if isinstance(m, nn.Linear)][-1].weight.zero_()


def _sgd_step(update, batch, model, method, p=0.5, lr=1e-2, seed=7):
    """One SGD step of ``update`` over its declared parameters; asserts that exactly those could move."""
    everything = {**dict(model.named_parameters(prefix="model")), **dict(method.named_parameters(prefix="method"))}
    before = {k: v.detach().clone() for k, v in everything.items()}
    opt = torch.optim.SGD(update.parameters(), lr=lr)
    torch.manual_seed(seed)  # the same dropout masks as the caller's measurement with this seed
    opt.zero_grad()
    _loss(update, batch, p)[0].backward()
    opt.step()
    declared = {id(q) for q in update.parameters()}
    moved = {k for k, v in everything.items() if not torch.equal(before[k], v)}
    assert moved, f"update {update.name!r} moved nothing"
    assert all(id(everything[k]) in declared for k in moved), f"undeclared parameters moved: {sorted(moved)}"


def _update(method, name):
    return next(u for st in method.stages() for u in st.updates if u.name == name)


# -- shared option checks -------------------------------------------------------------------------------------
@pytest.mark.parametrize("name", ["dann", "cdan", "confusion", "coral", "mmd"])
def test_negative_weight_is_refused(name):
    with pytest.raises(ValueError, match=re.escape(
            f"The 'weight' parameter of method {name!r} must be in the range [0, inf). Got -1.0 instead.")):
        _make(name, weight=-1.0)


@pytest.mark.parametrize("name", ["dann", "cdan", "confusion", "coral", "mmd"])
def test_unknown_weight_schedule_is_refused(name):
    with pytest.raises(ValueError, match=re.escape(f"The 'weight_schedule' parameter of method {name!r} must be one "
                                                   "of {'constant', 'dann_ramp'}. Got 'linear_ramp' instead.")):
        _make(name, weight_schedule="linear_ramp")
    with pytest.raises(ValueError, match=re.escape(f"The 'weight_schedule' parameter of method {name!r}")):
        _make(name, weight_schedule="dann_anneal")  # a learning-rate schedule, not a weight schedule


@pytest.mark.parametrize("name", ["dann", "cdan", "confusion", "adda"])
def test_disc_hidden_must_be_positive_widths(name):
    with pytest.raises(TypeError, match=re.escape(
            f"The 'disc_hidden' parameter of method {name!r} must be a list of positive integers. Got 64 instead.")):
        _make(name, disc_hidden=64)
    with pytest.raises(ValueError, match=re.escape(f"The 'disc_hidden' parameter of method {name!r} must be in the "
                                                   "range [1, inf). Got 0 instead.")):
        _make(name, disc_hidden=[0])


# -- dann -----------------------------------------------------------------------------------------------------
def test_dann_one_update_over_encoder_head_discriminator():
    method = _make("dann")
    model = _attach(method)
    (stage,) = method.stages()
    (update,) = stage.updates
    assert update.modules == [model.encoder, model.head, method.discriminator]
    assert _all_have_grads(update, _batch())


def test_dann_encoder_gradient_is_ce_minus_lambda_times_domain_gradient():
    from adaptkit.losses import domain_bce, weighted_cross_entropy
    method = _make("dann", weight=2.0)
    model = _attach(method)
    b, p = _batch(weighted=True), 0.3
    lam = 2.0 * (2 / (1 + torch.exp(torch.tensor(-10 * p))) - 1)  # weight × λ_p (Ganin et al., JMLR 2016)
    enc = list(model.encoder.parameters())
    disc = list(method.discriminator.parameters())
    got = _grads(method.stages()[0].updates[0], b, [model.encoder, model.head, method.discriminator], p)
    g_enc, g_disc = got[:len(enc)], got[-len(disc):]
    # the same quantities without reversal, from plain autograd
    f_s, f_t = model.features(b.x_src, "source"), model.features(b.x_tgt, "target")
    ce = weighted_cross_entropy(model.head(f_s), b.y_src, b.w_src)
    dom = domain_bce(method.discriminator(f_s), method.discriminator(f_t), b.w_src)
    _assert_reversed(g_enc, g_disc, ce, dom, enc, disc, lam)


def test_dann_lambda_is_zero_at_start_and_weight_at_end():
    method = _make("dann", weight=6.0)
    _attach(method)
    assert method.lambda_at(0.0) == 0.0
    assert method.lambda_at(1.0) == pytest.approx(6.0, rel=1e-3)
    const = _make("dann", weight=6.0, weight_schedule="constant")
    _attach(const)
    assert const.lambda_at(0.0) == 6.0


def test_dann_one_step_discriminator_lowers_and_encoder_raises_the_domain_loss():
    from adaptkit.losses import domain_bce, weighted_cross_entropy
    method = _make("dann", weight=1.0)
    model = _attach(method)
    b = _double(model, method)
    _zero_last_linear(model.head)
    disc_old = copy.deepcopy(method.discriminator)
    with torch.no_grad():
        fs0, ft0 = model.features(b.x_src, "source"), model.features(b.x_tgt, "target")
        dom0 = domain_bce(disc_old(fs0), disc_old(ft0))
        ce0 = weighted_cross_entropy(model.head(fs0), b.y_src)
    _sgd_step(_update(method, "adversarial"), b, model, method)
    with torch.no_grad():
        fs1, ft1 = model.features(b.x_src, "source"), model.features(b.x_tgt, "target")
        # the discriminator minimises the domain loss (Ganin et al., JMLR 2016, Eq. 18's update of u) ...
        assert domain_bce(method.discriminator(fs0), method.discriminator(ft0)) < dom0
        # ... and the encoder, through the reversed gradient, maximises it (Eq. 18's update of θ_f: −λ ∂L_d/∂θ_f)
        assert domain_bce(disc_old(fs1), disc_old(ft1)) > dom0
        assert weighted_cross_entropy(model.head(fs0), b.y_src) < ce0  # the head minimises the source CE


def test_dann_gamma_option_reaches_the_ramp():
    # λ_p = weight · (2/(1+exp(−γp)) − 1), Ganin et al., JMLR 2016, §5.2.2, at γ = 3 instead of the paper's 10
    method = _make("dann", weight=2.0, gamma=3.0)
    assert method.lambda_at(0.4) == pytest.approx(2.0 * (2 / (1 + math.exp(-3 * 0.4)) - 1))
    assert _make("dann", weight=2.0).lambda_at(0.4) == pytest.approx(2.0 * (2 / (1 + math.exp(-10 * 0.4)) - 1))


def test_mmd_with_the_dann_ramp_gets_the_papers_gamma():
    method = _make("mmd", weight=3.0, weight_schedule="dann_ramp")  # MMD has no gamma option: γ = 10 (§5.2.2)
    assert method.weight_at(0.2) == pytest.approx(3.0 * (2 / (1 + math.exp(-10 * 0.2)) - 1))


def test_dann_bad_gamma():
    with pytest.raises(ValueError, match=re.escape(
            "The 'gamma' parameter of method 'dann' must be in the range (0, inf). Got 0.0 instead.")):
        _make("dann", gamma=0.0)


# -- cdan -----------------------------------------------------------------------------------------------------
def _cdan_domain_loss(method, model, b, disc=None, head=None, entropy=False):
    """CDAN's domain loss recomputed outside the method: the discriminator on numpy-free torch.einsum outer
    products f ⊗ softmax(head(f)) (Long et al., NeurIPS 2018, §3), optionally CDAN+E-weighted per domain."""
    from adaptkit.losses import domain_bce, entropy_weights
    disc, head = disc or method.discriminator, head or model.head
    f_s, f_t = model.features(b.x_src, "source"), model.features(b.x_tgt, "target")
    l_s, l_t = head(f_s), head(f_t)
    t_s = torch.einsum("bi,bk->bik", f_s, l_s.softmax(1)).flatten(1)
    t_t = torch.einsum("bi,bk->bik", f_t, l_t.softmax(1)).flatten(1)
    w_s = entropy_weights(l_s) if entropy else None
    w_t = entropy_weights(l_t) if entropy else None
    return domain_bce(disc(t_s), disc(t_t), w_s, w_t)


def test_cdan_one_update_and_discriminator_on_the_multilinear_map():
    method = _make("cdan")
    model = _attach(method)
    (stage,) = method.stages()
    (update,) = stage.updates
    assert update.modules == [model.encoder, model.head, method.discriminator]
    assert not method.randomized and method.discriminator.net[0].in_features == 4 * 3  # F·K = 12 <= 4096
    assert _all_have_grads(update, _batch())


@pytest.mark.parametrize("entropy", [False, True], ids=["cdan", "cdan_e"])
def test_cdan_domain_loss_matches_einsum_recomputation(entropy):
    method = _make("cdan", entropy_weighting=entropy)
    model = _attach(method)
    b = _batch()
    loss, logs = _loss(method.stages()[0].updates[0], b)
    with torch.no_grad():
        torch.testing.assert_close(logs["domain"], _cdan_domain_loss(method, model, b, entropy=entropy))
    torch.testing.assert_close(loss, logs["ce"] + logs["domain"])


def test_cdan_e_weights_multiply_the_source_class_weights():
    from adaptkit.losses import domain_bce, entropy_weights
    method = _make("cdan", entropy_weighting=True)
    model = _attach(method)
    b = _batch(weighted=True)
    _, logs = _loss(method.stages()[0].updates[0], b)
    with torch.no_grad():
        f_s, f_t = model.features(b.x_src, "source"), model.features(b.x_tgt, "target")
        l_s, l_t = model.head(f_s), model.head(f_t)
        d_s = method.discriminator(torch.einsum("bi,bk->bik", f_s, l_s.softmax(1)).flatten(1))
        d_t = method.discriminator(torch.einsum("bi,bk->bik", f_t, l_t.softmax(1)).flatten(1))
        ref = domain_bce(d_s, d_t, entropy_weights(l_s) * b.w_src, entropy_weights(l_t))
    torch.testing.assert_close(logs["domain"], ref)


def test_cdan_softmax_conditioning_reaches_the_discriminator():
    # Same features, different head outputs → a different domain loss: the discriminator sees g, not only f.
    # (float64: the change is far above round-off; a fresh discriminator sits near log 2, so changes are small)
    method = _make("cdan")
    model = _attach(method)
    b = _double(model, method)
    update = method.stages()[0].updates[0]
    _, logs0 = _loss(update, b)
    f_before = model.features(b.x_src, "source").detach()
    with torch.no_grad():
        last = [m for m in model.head.modules() if isinstance(m, nn.Linear)][-1]
        last.weight.mul_(-3.0)
    _, logs1 = _loss(update, b)
    torch.testing.assert_close(model.features(b.x_src, "source"), f_before)  # the features did not change
    assert abs(logs1["domain"].item() - logs0["domain"].item()) > 1e-6  # round-off is ~1e-16
    # the new value is the einsum recomputation with the new head's softmax (a features-only discriminator, or g
    # frozen, would have kept the old value)
    with torch.no_grad():
        torch.testing.assert_close(logs1["domain"], _cdan_domain_loss(method, model, b), rtol=1e-12, atol=1e-12)


def test_cdan_predictions_enter_detached_unless_asked():
    b = _batch()
    for through in (False, True):
        method = _make("cdan", grad_through_predictions=through)
        model = _attach(method)
        # the head's gradient from the domain term alone (torch.autograd), through the method's own map
        f_s = model.features(b.x_src, "source").detach()
        d = method.discriminator(method.conditioned(f_s, model.head(f_s))).sum()
        grads = torch.autograd.grad(d, list(model.head.parameters()), allow_unused=True)
        reaches = any(g is not None and g.abs().sum() > 0 for g in grads)
        assert reaches == through


def test_cdan_encoder_gradient_is_ce_minus_lambda_times_domain_gradient():
    from adaptkit.losses import weighted_cross_entropy
    method = _make("cdan", weight=2.0)
    model = _attach(method)
    b, p = _batch(weighted=True), 0.3
    lam = 2.0 * (2 / (1 + torch.exp(torch.tensor(-10 * p))) - 1)  # weight × DANN's λ_p (Ganin et al., JMLR 2016)
    enc, disc = list(model.encoder.parameters()), list(method.discriminator.parameters())
    got = _grads(method.stages()[0].updates[0], b, [model.encoder, model.head, method.discriminator], p)
    g_enc, g_disc = got[:len(enc)], got[-len(disc):]
    # plain autograd on the un-reversed terms, with g detached as the method's default does
    from adaptkit.losses import domain_bce
    f_s, f_t = model.features(b.x_src, "source"), model.features(b.x_tgt, "target")
    ce = weighted_cross_entropy(model.head(f_s), b.y_src, b.w_src)
    t_s = torch.einsum("bi,bk->bik", f_s, model.head(f_s).softmax(1).detach()).flatten(1)
    t_t = torch.einsum("bi,bk->bik", f_t, model.head(f_t).softmax(1).detach()).flatten(1)
    dom = domain_bce(method.discriminator(t_s), method.discriminator(t_t), b.w_src)
    _assert_reversed(g_enc, g_disc, ce, dom, enc, disc, lam)


@pytest.mark.parametrize("options", [{}, {"entropy_weighting": True}, {"max_map_size": 0, "random_dim": 32}],
                         ids=["exact", "cdan_e", "randomized"])
def test_cdan_one_step_discriminator_lowers_and_encoder_raises_the_domain_loss(options):
    from adaptkit.losses import weighted_cross_entropy
    method = _make("cdan", weight=1.0, **options)
    model = _attach(method)
    b = _double(model, method)
    _zero_last_linear(model.head)  # the CE sends nothing into the encoder: its step is the reversed domain term's
    disc_old, head_old, enc_old = (copy.deepcopy(m) for m in (method.discriminator, model.head, model.encoder))
    update = _update(method, "adversarial")

    def dom(disc, enc, head):  # the method's own domain term, with the given parts
        with torch.no_grad():
            f_s, f_t = enc(b.x_src), enc(b.x_tgt)
            d_s = disc(method.conditioned(f_s, head(f_s)))
            d_t = disc(method.conditioned(f_t, head(f_t)))
            acc = 0.5 * ((d_s > 0).double().mean() + (d_t < 0).double().mean())
            return _cdan_dom(method, d_s, d_t, head(f_s), head(f_t)), acc

    dom0, _ = dom(disc_old, enc_old, head_old)
    with torch.no_grad():
        ce0 = weighted_cross_entropy(head_old(enc_old(b.x_src)), b.y_src)
    _sgd_step(update, b, model, method)  # one step; checks that only declared parameters moved
    # the discriminator minimises the conditional domain loss (Long et al., NeurIPS 2018, §3: min over D) ...
    dom_d, acc_d = dom(method.discriminator, enc_old, head_old)
    _, acc0 = dom(disc_old, enc_old, head_old)
    assert dom_d < dom0 and acc_d >= acc0
    # ... and the encoder, through the reversed gradient, maximises it (max over the features)
    assert dom(disc_old, model.encoder, head_old)[0] > dom0
    with torch.no_grad():
        assert weighted_cross_entropy(model.head(enc_old(b.x_src)), b.y_src) < ce0  # the head minimises the CE


def _cdan_dom(method, d_s, d_t, l_s, l_t):
    from adaptkit.losses import domain_bce, entropy_weights
    if method.options.entropy_weighting:
        return domain_bce(d_s, d_t, entropy_weights(l_s), entropy_weights(l_t))
    return domain_bce(d_s, d_t)


def test_cdan_randomized_map_above_the_size_threshold():
    torch.manual_seed(11)
    method = _make("cdan", max_map_size=11, random_dim=16)  # F·K = 12 > 11: randomised
    model = _attach(method)
    assert method.randomized and method.r_f.shape == (16, 4) and method.r_g.shape == (16, 3)
    assert method.discriminator.net[0].in_features == 16
    assert {"r_f", "r_g"} <= set(method.state_dict())  # the matrices travel with checkpoints
    again = _make("cdan", max_map_size=11, random_dim=16)
    _attach(again)  # _attach seeds the global generator: the same run seed draws the same matrices
    assert torch.equal(again.r_f, method.r_f) and torch.equal(again.r_g, method.r_g)
    b = _batch()
    _, logs = _loss(method.stages()[0].updates[0], b)
    from adaptkit.losses import domain_bce
    with torch.no_grad():
        f_s, f_t = model.features(b.x_src, "source"), model.features(b.x_tgt, "target")
        g_s, g_t = model.head(f_s).softmax(1), model.head(f_t).softmax(1)
        t_s = (f_s @ method.r_f.T) * (g_s @ method.r_g.T) / 4.0  # (R_f f) ⊙ (R_g g) / √16
        t_t = (f_t @ method.r_f.T) * (g_t @ method.r_g.T) / 4.0
        torch.testing.assert_close(logs["domain"], domain_bce(method.discriminator(t_s), method.discriminator(t_t)))
    assert _all_have_grads(method.stages()[0].updates[0], b)
    at_threshold = _make("cdan", max_map_size=12)  # F·K = 12 <= 12: the exact map (the paper: F·K <= 4096)
    _attach(at_threshold)
    assert not at_threshold.randomized and at_threshold.discriminator.net[0].in_features == 12


def test_cdan_bad_options():
    with pytest.raises(TypeError, match=re.escape(
            "The 'entropy_weighting' parameter of method 'cdan' must be true or false. Got 'yes' instead.")):
        _make("cdan", entropy_weighting="yes")
    with pytest.raises(ValueError, match=re.escape(
            "The 'random_dim' parameter of method 'cdan' must be in the range [1, inf). Got 0 instead.")):
        _make("cdan", random_dim=0)


# -- confusion ------------------------------------------------------------------------------------------------
def test_confusion_alternates_discriminator_then_encoder_head():
    method = _make("confusion")
    model = _attach(method)
    disc_up, main_up = method.stages()[0].updates
    assert disc_up.modules == [method.discriminator] and main_up.modules == [model.encoder, model.head]
    assert method.discriminator.outputs == 2
    b = _batch()
    assert _all_have_grads(disc_up, b) and _all_have_grads(main_up, b)
    # the discriminator update trains on detached features: nothing reaches the encoder
    assert all(g is None for g in _grads(disc_up, b, [model.encoder]))


def test_confusion_weight_zero_is_source_ce():
    method = _make("confusion", weight=0.0)
    _attach(method)
    b = _batch()
    loss, logs = _loss(method.stages()[0].updates[1], b)
    torch.testing.assert_close(loss, method.source_loss(b)[0])
    assert set(logs) == {"ce", "confusion"}


def test_confusion_one_step_discriminator_learns_the_domains_and_encoder_confuses_them():
    from adaptkit.losses import confusion_loss, domain_cross_entropy
    method = _make("confusion", weight=1.0)
    model = _attach(method)
    b = _double(model, method)
    _zero_last_linear(model.head)
    disc_up, main_up = method.stages()[0].updates
    with torch.no_grad():
        fs0, ft0 = model.features(b.x_src, "source"), model.features(b.x_tgt, "target")
        d0 = domain_cross_entropy(method.discriminator(fs0), method.discriminator(ft0))
    _sgd_step(disc_up, b, model, method)  # moves the domain classifier only
    with torch.no_grad():
        # Tzeng et al., ICCV 2015, §3.1: the domain classifier minimises L_D ...
        assert domain_cross_entropy(method.discriminator(fs0), method.discriminator(ft0)) < d0
        conf = lambda fs, ft: 0.5 * (confusion_loss(method.discriminator(fs)) + confusion_loss(method.discriminator(ft)))
        c0 = conf(fs0, ft0)
    _sgd_step(main_up, b, model, method)  # moves encoder and head only
    with torch.no_grad():
        fs1, ft1 = model.features(b.x_src, "source"), model.features(b.x_tgt, "target")
        assert conf(fs1, ft1) < c0  # ... and the encoder minimises L_conf: the domains look alike to it


# -- adda -----------------------------------------------------------------------------------------------------
def _bn_encoder():
    return nn.Sequential(nn.Linear(2, 8), nn.BatchNorm1d(8), nn.ReLU(), nn.Linear(8, 4))


def test_adda_stages_and_target_encoder():
    method = _make("adda", pretrain_share=0.25)
    model = _attach(method, encoder=_bn_encoder())
    pre, adapt = method.stages()
    assert (pre.name, pre.share, adapt.name, adapt.share) == ("pretrain", 0.25, "adapt", 0.75)
    assert pre.updates[0].modules == [model.encoder, model.head]
    d_up, t_up = adapt.updates
    assert d_up.modules == [method.discriminator] and t_up.modules == [model.target_encoder]
    assert d_up.optimizer == t_up.optimizer == {"name": "adam", "lr": 0.0002, "betas": [0.5, 0.999]}
    # the target encoder exists from setup, so state dicts have one shape from the first checkpoint on
    assert model.target_encoder is not model.encoder
    assert model.target_encoder.state_dict().keys() == model.encoder.state_dict().keys()


def test_adda_adapt_copies_source_encoder_then_leaves_it_and_head_bit_identical():
    method = _make("adda")
    model = _attach(method, encoder=_bn_encoder())
    model.train()
    with torch.no_grad():  # pretend pretraining moved the source encoder
        for q in model.encoder.parameters():
            q.add_(0.1)
    adapt = method.stages()[1]
    method.on_stage_start(adapt)
    for k, v in model.encoder.state_dict().items():
        assert torch.equal(model.target_encoder.state_dict()[k], v)
    before = {k: v.clone() for k, v in {**model.encoder.state_dict(), **model.head.state_dict()}.items()}
    tgt_before = [q.clone() for q in model.target_encoder.parameters()]
    b = _batch()
    for update in adapt.updates:  # what the loop would do: one optimiser per update, over its modules only
        assert _all_have_grads(update, b)
        opt = torch.optim.Adam(update.parameters(), lr=1e-2)
        for _ in range(3):
            opt.zero_grad()
            _loss(update, b)[0].backward()
            opt.step()
    after = {**model.encoder.state_dict(), **model.head.state_dict()}
    assert all(torch.equal(before[k], after[k]) for k in before)  # including batch-norm running statistics
    assert any(not torch.equal(a, q) for a, q in zip(tgt_before, model.target_encoder.parameters()))
    assert model.encoder.training  # the frozen pass restored the mode it found


def test_adda_one_step_discriminator_and_target_encoder_pull_opposite_ways():
    from adaptkit.losses import domain_bce, inverted_label_loss
    method = _make("adda")
    model = _attach(method, encoder=_bn_encoder())
    b = _double(model, method)
    method.on_stage_start(method.stages()[1])
    with torch.no_grad():  # with noise so that M_t ≠ M_s and the discriminator has something to tell apart
        for q in model.target_encoder.parameters():
            q.add_(0.3 * torch.randn_like(q))
    model.eval()  # measure without moving batch-norm statistics
    d_up, t_up = method.stages()[1].updates

    def disc_loss():
        return domain_bce(method.discriminator(model.source_encoder(b.x_src)),
                          method.discriminator(model.target_encoder(b.x_tgt)))

    with torch.no_grad():
        l0 = disc_loss()
    _sgd_step(d_up, b, model, method)  # only the discriminator moves
    with torch.no_grad():
        l1 = disc_loss()
        assert l1 < l0  # the discriminator minimises L_advD (Tzeng et al., CVPR 2017, §3)
        g0 = inverted_label_loss(method.discriminator(model.target_encoder(b.x_tgt)))
    _sgd_step(t_up, b, model, method)  # only the target encoder moves
    with torch.no_grad():
        # M_t minimises L_advM: target features look more like source to D, so D's own loss goes up
        assert inverted_label_loss(method.discriminator(model.target_encoder(b.x_tgt))) < g0
        assert disc_loss() > l1


def test_adda_model_owns_the_encoders_and_target_data_use_the_source_encoder_until_adapt():
    torch.manual_seed(0)
    model = AdaptedModel(_bn_encoder(), LinearHead(4, 3), feature_dim=4, n_classes=3)
    assert model.target_encoder is model.source_encoder is model.encoder  # shared unless a method unshares it
    keys_shared = set(model.state_dict())
    method = _make("adda")
    method.attach(model, SetupInfo(feature_dim=4, n_classes=3, input_shape=(2,), batch_size=8, steps=10))
    assert model.target_encoder is not model.encoder
    assert set(model.state_dict()) == keys_shared | {f"target_encoder.{k}" for k in model.encoder.state_dict()}
    model.eval()
    x = torch.randn(5, 2)
    with torch.no_grad():
        for q in model.target_encoder.parameters():  # make M_t differ, as if it had trained
            q.add_(1.0)
        torch.testing.assert_close(model(x), model.head(model.encoder(x)))  # pretraining: target data → M_s
        method.on_stage_start(method.stages()[1])
        assert bool(model.target_encoder_active)
        torch.testing.assert_close(model(x), model.head(model.encoder(x)))  # M_t starts as a copy of M_s
        for q in model.target_encoder.parameters():
            q.add_(1.0)
        torch.testing.assert_close(model(x), model.head(model.target_encoder(x)))  # adapt: target data → M_t
        torch.testing.assert_close(model(x, "source"), model.head(model.encoder(x)))
    with pytest.raises(RuntimeError, match="already unshared"):
        model.unshare_target_encoder()


def test_adda_bad_options():
    with pytest.raises(ValueError, match=re.escape(
            "The 'pretrain_share' parameter of method 'adda' must be in the range (0, 1). Got 1.0 instead.")):
        _make("adda", pretrain_share=1.0)
    with pytest.raises(ValueError, match=re.escape(
            "The 'adapt_betas' parameter of method 'adda' must be a list of two numbers in [0, 1). "
            "Got [0.5] instead.")):
        _make("adda", adapt_betas=[0.5])


# -- adr ------------------------------------------------------------------------------------------------------
def test_adr_three_updates():
    method = _make("adr", n_generator_steps=3)
    model = _attach(method, head=MLPHead(4, 3, hidden=[8]))
    cls, critic, gen = method.stages()[0].updates
    assert cls.modules == [model.encoder, model.head] and critic.modules == [model.head]
    assert gen.modules == [model.encoder] and gen.repeat == 3
    b = _batch()
    assert _all_have_grads(cls, b) and _all_have_grads(critic, b) and _all_have_grads(gen, b)
    assert all(g is None for g in _grads(critic, b, [model.encoder]))  # the critic step leaves the encoder alone


def test_adr_sensitivity_uses_dropout_even_in_eval_mode():
    method = _make("adr", weight=1.0)
    model = _attach(method, head=MLPHead(4, 3, hidden=[8]))
    model.eval()
    torch.manual_seed(3)
    f_t = torch.randn(16, 4)
    assert method.sensitivity(f_t) > 0  # two dropout masks, two predictions
    assert not model.head.training  # mode restored
    loss, logs = _loss(method.stages()[0].updates[1], _batch())
    torch.testing.assert_close(loss, logs["ce"] - logs["sensitivity"])


def test_adr_one_step_critic_raises_and_generator_lowers_the_sensitivity():
    method = _make("adr", weight=50.0)  # a large weight: the critic's step is led by the sensitivity term
    model = _attach(method, head=MLPHead(4, 3, hidden=[8]))
    b = _double(model, method)
    critic, gen = _update(method, "critic"), _update(method, "generator")

    def measured(update, key=None, seed=7):  # the update's own terms, with the step's dropout masks (same seed)
        torch.manual_seed(seed)
        with torch.no_grad():
            loss, logs = _loss(update, b)
        return logs[key] if key else loss

    s0 = measured(critic, "sensitivity")
    _sgd_step(critic, b, model, method)  # the head only
    # the critic maximises the sensitivity on target features (Saito et al., ICLR 2018, step 2: CE − sensitivity)
    assert measured(critic, "sensitivity") > s0

    def sensitivity(seed=7):  # the generator step draws its masks in this order: encoder (no dropout), head, head
        torch.manual_seed(seed)
        with torch.no_grad():
            return method.sensitivity(model.features(b.x_tgt, "target"))

    g0 = sensitivity()
    _sgd_step(gen, b, model, method)  # the encoder only
    assert sensitivity() < g0  # the generator minimises it (step 3)


def test_adr_needs_a_head_with_dropout():
    with pytest.raises(ValueError, match=re.escape(
            "method 'adr' needs a head containing dropout (an nn.Dropout with p > 0) so that two passes in training "
            "mode sample two classifiers; the head LinearHead has none.")):
        _attach(_make("adr"), head=LinearHead(4, 3))
    with pytest.raises(ValueError, match=re.escape("the head MLPHead has none")):
        _attach(_make("adr"))  # MLPHead with dropout 0


def test_adr_bad_options():
    with pytest.raises(ValueError, match=re.escape(
            "The 'divergence' parameter of method 'adr' must be one of {'symmetric_kl', 'l1'}. Got 'kl' instead.")):
        _make("adr", divergence="kl")
    with pytest.raises(ValueError, match=re.escape(
            "The 'n_generator_steps' parameter of method 'adr' must be in the range [1, inf). Got 0 instead.")):
        _make("adr", n_generator_steps=0)
    l1 = _make("adr", divergence="l1")
    _attach(l1, head=MLPHead(4, 3))
    _loss(l1.stages()[0].updates[2], _batch())


# -- mcd ------------------------------------------------------------------------------------------------------
def test_mcd_three_updates_and_a_second_head_that_starts_different():
    method = _make("mcd")
    model = _attach(method)
    a, b_, c = method.stages()[0].updates
    assert (a.name, b_.name, c.name) == ("classify", "critic", "generator")
    assert a.modules == [model.encoder, model.head, method.second_head]
    assert b_.modules == [model.head, method.second_head] and c.modules == [model.encoder]
    assert c.repeat == 4  # the paper's n = 4 (Saito et al., CVPR 2018)
    assert type(method.second_head) is type(model.head)
    assert any(not torch.equal(p, q) for p, q in zip(model.head.parameters(), method.second_head.parameters()))
    batch = _batch()
    assert _all_have_grads(a, batch) and _all_have_grads(b_, batch) and _all_have_grads(c, batch)
    assert all(g is None for g in _grads(b_, batch, [model.encoder]))  # step B leaves the encoder alone


def test_mcd_losses_match_their_formulas_with_numpy():
    from scipy.special import softmax as np_softmax
    method = _make("mcd", weight=0.7)
    model = _attach(method)
    b = _batch(weighted=True)
    a, crit, gen = method.stages()[0].updates
    with torch.no_grad():
        f_s, f_t = model.features(b.x_src, "source"), model.features(b.x_tgt, "target")
        p1 = np_softmax(model.head(f_t).numpy(), axis=1)
        p2 = np_softmax(method.second_head(f_t).numpy(), axis=1)
    d = np.abs(p1 - p2).mean()  # (1/K) Σ_k |p1_k − p2_k|, averaged over target samples (Saito et al., CVPR 2018)
    from adaptkit.losses import weighted_cross_entropy
    with torch.no_grad():
        ce = (weighted_cross_entropy(model.head(f_s), b.y_src, b.w_src)
              + weighted_cross_entropy(method.second_head(f_s), b.y_src, b.w_src)).item()
    loss_a, _ = _loss(a, b)
    loss_b, logs_b = _loss(crit, b)
    loss_c, logs_c = _loss(gen, b)
    assert loss_a.item() == pytest.approx(ce, rel=1e-6)
    assert logs_b["discrepancy"].item() == pytest.approx(d, rel=1e-5)
    assert loss_b.item() == pytest.approx(ce - 0.7 * d, rel=1e-5)
    assert loss_c.item() == pytest.approx(0.7 * d, rel=1e-5)


def test_mcd_step_b_raises_the_discrepancy_and_leaves_the_encoder_unchanged():
    method = _make("mcd", weight=50.0)  # the discrepancy leads step B's gradient (the CE alone would not raise it)
    model = _attach(method)
    b = _double(model, method)
    enc_before = copy.deepcopy(model.encoder.state_dict())
    with torch.no_grad():
        f_t = model.features(b.x_tgt, "target")
        d0 = method.discrepancy(f_t)
    _sgd_step(_update(method, "critic"), b, model, method)  # asserts that only the two heads moved
    assert all(torch.equal(v, model.encoder.state_dict()[k]) for k, v in enc_before.items())
    with torch.no_grad():
        # step B maximises the discrepancy over F1, F2 on fixed target features (Saito et al., CVPR 2018, step B)
        assert method.discrepancy(f_t) > d0


def test_mcd_step_c_lowers_the_discrepancy_and_leaves_the_heads_unchanged():
    method = _make("mcd")
    model = _attach(method)
    b = _double(model, method)
    heads_before = [copy.deepcopy(h.state_dict()) for h in (model.head, method.second_head)]
    with torch.no_grad():
        d0 = method.discrepancy(model.features(b.x_tgt, "target"))
    _sgd_step(_update(method, "generator"), b, model, method, lr=0.1)  # asserts that only the encoder moved
    for h, before in zip((model.head, method.second_head), heads_before):
        assert all(torch.equal(v, h.state_dict()[k]) for k, v in before.items())
    with torch.no_grad():
        # step C minimises the discrepancy over the encoder, the heads fixed (Saito et al., CVPR 2018, step C)
        assert method.discrepancy(model.features(b.x_tgt, "target")) < d0


def test_mcd_refuses_a_head_it_cannot_reinitialise():
    class Fixed(nn.Module):  # a head with a parameter no reset_parameters touches
        def __init__(self):
            super().__init__()
            self.w = nn.Parameter(torch.ones(4, 3))

        def forward(self, f):
            return f @ self.w

    with pytest.raises(ValueError, match=re.escape(
            "method 'mcd' needs a second classifier that starts different from the first; re-initialising a copy "
            "of the head Fixed changed none of its parameters")):
        _attach(_make("mcd"), head=Fixed())


# -- coral, mmd -----------------------------------------------------------------------------------------------
@pytest.mark.parametrize("name", ["coral", "mmd"])
def test_coral_mmd_one_update_with_logged_parts(name):
    method = _make(name, weight=1.0, weight_schedule="constant")  # λ_p = 1 at every p: loss = ce + align
    model = _attach(method)
    (update,) = method.stages()[0].updates
    assert update.modules == [model.encoder, model.head]
    b = _batch(weighted=True)
    loss, logs = _loss(update, b)
    assert set(logs) == {"ce", "align"} and logs["align"].item() != 0
    torch.testing.assert_close(loss, logs["ce"] + logs["align"])
    torch.testing.assert_close(logs["ce"], method.source_loss(b)[0])  # source weights honoured in the CE
    assert _all_have_grads(update, b)


@pytest.mark.parametrize("name, why", [("coral", "a covariance needs 2 samples per domain"),
                                       ("mmd", "the MMD estimators need 2 samples per domain")])
def test_coral_mmd_need_batches_of_two(name, why):
    with pytest.raises(ValueError, match=re.escape(
            f"method {name!r} needs a batch size of at least 2 ({why}); got batch_size=1.")):
        _attach(_make(name), batch_size=1)


def test_mmd_bad_options():
    with pytest.raises(ValueError, match=re.escape(
            "The 'estimator' parameter of method 'mmd' must be one of {'biased', 'unbiased', 'linear'}. "
            "Got 'quadratic' instead.")):
        _make("mmd", estimator="quadratic")
    with pytest.raises(ValueError, match=re.escape(
            "The 'kernel_mul' parameter of method 'mmd' must be in the range (1, inf). Got 1.0 instead.")):
        _make("mmd", kernel_mul=1.0)
    with pytest.raises(TypeError, match=re.escape(
            "The 'n_kernels' parameter of method 'mmd' must be an integer. Got 2.5 instead.")):
        _make("mmd", n_kernels=2.5)
    for est in ("biased", "linear"):
        m = _make("mmd", estimator=est)
        _attach(m)
        _loss(m.stages()[0].updates[0], _batch())


# -- feature_loss ---------------------------------------------------------------------------------------------
def _mean_gap(fs, ft):
    return (fs.mean(0) - ft.mean(0)).pow(2).sum()


def test_feature_loss_wraps_a_plain_function():
    from adaptkit.methods import build_method
    method = build_method(_mean_gap, weight=0.5)
    assert method.name == "feature_loss" and method.options.loss_fn is _mean_gap  # stored verbatim
    model = _attach(method)
    b = _batch()
    loss, logs = _loss(method.stages()[0].updates[0], b)
    f_s, f_t = model.features(b.x_src, "source"), model.features(b.x_tgt, "target")
    torch.testing.assert_close(logs["align"], _mean_gap(f_s, f_t))
    torch.testing.assert_close(loss, logs["ce"] + 0.5 * logs["align"])


def test_feature_loss_import_path():
    method = _make("feature_loss", loss_fn="adaptkit.losses.coral_distance")
    assert method.options.loss_fn == "adaptkit.losses.coral_distance"
    _attach(method)
    _loss(method.stages()[0].updates[0], _batch())


def test_feature_loss_bad_loss_fn():
    with pytest.raises(ValueError, match=re.escape(
            "The 'loss_fn' parameter of method 'feature_loss' names 'adaptkit.losses.no_such_loss', which cannot be "
            "imported")):
        _make("feature_loss", loss_fn="adaptkit.losses.no_such_loss")
    with pytest.raises(ValueError, match=re.escape(
            "The 'loss_fn' parameter of method 'feature_loss' must be a callable or an import path "
            "'module.attribute'. Got 'mmd2' instead.")):
        _make("feature_loss", loss_fn="mmd2")
    with pytest.raises(TypeError, match=re.escape(
            "The 'loss_fn' parameter of method 'feature_loss' must be a function (source_features, target_features) "
            "-> scalar tensor, or its import path. Got None instead.")):
        _make("feature_loss")
    method = _make("feature_loss", loss_fn=lambda fs, ft: fs - ft)
    _attach(method)
    with pytest.raises(TypeError, match=re.escape("must return a scalar tensor (one element, differentiable); got a "
                                                  "tensor of shape (8, 4)")):
        method.stages()[0].updates[0].loss(_batch(), Progress(0, "train", 0, 0.0))


# -- self_training --------------------------------------------------------------------------------------------
def _confidences(batch):
    """The tiny model's target confidences max_k p_k on ``batch`` (the model _attach builds, seeded)."""
    probe = _make("self_training")
    model = _attach(probe)
    with torch.no_grad():
        return torch.softmax(model(batch.x_tgt, domain="target"), 1).max(1).values


def _self_training(batch, share_kept=0.5, **options):
    """The method with a threshold that keeps ``share_kept`` of ``batch``'s target rows, attached."""
    threshold = float(torch.quantile(_confidences(batch).double(), 1 - share_kept))
    method = _make("self_training", threshold=threshold, **{"class_balanced": False, **options})
    return method, _attach(method)


def test_self_training_pretrains_on_source_then_self_trains():
    method = _make("self_training", pretrain_share=0.3)
    model = _attach(method)
    pre, st = method.stages()
    assert (pre.name, st.name) == ("pretrain", "self_train") and (pre.share, st.share) == (0.3, pytest.approx(0.7))
    (classify,), (self_train,) = pre.updates, st.updates
    assert classify.modules == [model.encoder, model.head] and self_train.modules == [model.encoder, model.head]
    b = _batch()
    torch.testing.assert_close(_loss(classify, b)[0], method.source_loss(b)[0])  # pretraining: source CE alone
    assert method.options.threshold == 0.95 and method.options.class_balanced is True  # ours (benchmarks/defaults.py)


def test_self_training_pseudo_label_loss_is_cross_entropy_on_the_confident_rows_by_hand():
    from scipy.special import log_softmax
    b = _batch(n=16, weighted=True)
    method, model = _self_training(b, weight=0.7)
    with torch.no_grad():
        z = model(b.x_tgt, domain="target").numpy().astype(np.float64)  # (16, 3)
        ce_src = method.source_loss(b)[0].item()
    log_p = log_softmax(z, axis=1)
    rows = np.exp(log_p).max(1) > method.options.threshold  # Lee (2013): argmax as the label; FixMatch's mask
    labels = z.argmax(1)
    assert 0 < rows.sum() < 16
    by_hand = -log_p[rows, labels[rows]].mean()
    loss, logs = _loss(_update(method, "self_train"), b)
    assert logs["pseudo"].item() == pytest.approx(by_hand, rel=1e-5)
    ref = torch.nn.functional.cross_entropy(torch.as_tensor(z[rows]), torch.as_tensor(labels[rows]))
    assert logs["pseudo"].item() == pytest.approx(ref.item(), rel=1e-5)  # torch's own CE on those rows
    assert logs["kept"].item() == pytest.approx(rows.mean())
    assert logs["ce"].item() == pytest.approx(ce_src, rel=1e-6)  # source weights honoured
    lam = method.weight_at(0.5)
    assert loss.item() == pytest.approx(ce_src + lam * by_hand, rel=1e-5)


def test_self_training_no_gradient_flows_through_the_pseudo_labels():
    # With the labels y constant, ∂CE/∂z_i = (softmax(z_i) − onehot(y_i)) / n_kept on the kept rows and 0 elsewhere
    # (the cross-entropy gradient); a gradient through the labels (e.g. soft targets from undetached p) differs.
    from adaptkit.losses import pseudo_label_loss
    g = torch.Generator().manual_seed(3)
    z = (3 * torch.randn(20, 4, generator=g, dtype=torch.float64)).requires_grad_()
    loss, kept = pseudo_label_loss(z, 0.8)
    (grad,) = torch.autograd.grad(loss, z)
    p = torch.softmax(z.detach(), 1)
    rows = p.max(1).values > 0.8
    assert 0 < rows.sum() < 20
    expected = torch.zeros_like(p)
    expected[rows] = (p - torch.nn.functional.one_hot(p.argmax(1), 4))[rows] / rows.sum()
    torch.testing.assert_close(grad, expected)
    assert kept.item() == pytest.approx(rows.double().mean().item())
    assert not kept.requires_grad


def test_self_training_threshold_one_gives_exactly_the_source_only_loss():
    method = _make("self_training", threshold=1.0, weight=5.0)
    model = _attach(method)
    b = _batch(weighted=True)
    update = _update(method, "self_train")
    loss, logs = _loss(update, b)
    source, _ = method.source_loss(b)
    assert torch.equal(loss, source) and logs["kept"].item() == 0.0
    g_st = _grads(update, b, [model.encoder, model.head])
    g_src = _grads(_update(method, "classify"), b, [model.encoder, model.head])
    assert all(torch.equal(a, c) for a, c in zip(g_st, g_src))  # bit for bit the source-only gradient


def test_self_training_class_balance_keeps_equal_counts_of_the_most_confident():
    from adaptkit.losses import select_pseudo_labels
    rng = np.random.default_rng(0)
    k = 4
    p = rng.dirichlet(np.full(k, 0.3), size=200)
    p[:, 0] += 2.0 * (rng.random(200) < 0.5)  # class 0 favoured, so the counts differ before balancing
    p /= p.sum(1, keepdims=True)
    labels, keep = select_pseudo_labels(torch.as_tensor(p), 0.7, class_balanced=True)
    conf, y = p.max(1), p.argmax(1)
    above = np.bincount(y[conf > 0.7], minlength=k)  # numpy's per-class counts above the threshold
    assert above.max() > above[above > 0].min()  # unbalanced to start with
    m = above[above > 0].min()
    kept = np.bincount(y[keep.numpy()], minlength=k)
    np.testing.assert_array_equal(kept, np.where(above > 0, m, 0))  # equal counts per class (CBST's balance)
    for c in range(k):  # and the kept rows of each class are its m most confident
        rows = np.flatnonzero((y == c) & (conf > 0.7))
        top = rows[np.argsort(-conf[rows], kind="stable")[:m]]
        assert set(np.flatnonzero(keep.numpy() & (y == c))) == set(top)
    np.testing.assert_array_equal(labels.numpy(), y)
    _, plain = select_pseudo_labels(torch.as_tensor(p), 0.7)
    np.testing.assert_array_equal(plain.numpy(), conf > 0.7)


def test_self_training_class_balanced_option_reaches_the_loss():
    b = _batch(n=16)
    method, model = _self_training(b, share_kept=0.75, class_balanced=True)
    with torch.no_grad():
        p = torch.softmax(model(b.x_tgt, domain="target"), 1).numpy()
    y, above = p.argmax(1), p.max(1) > method.options.threshold
    counts = np.bincount(y[above], minlength=3)
    _, logs = _loss(_update(method, "self_train"), b)
    assert logs["kept"].item() == pytest.approx((counts > 0).sum() * counts[counts > 0].min() / 16)


def test_self_training_one_step_lowers_the_pseudo_label_cross_entropy():
    method, model = _self_training(_batch(), weight=20.0)  # the pseudo-label term leads the step
    b = _double(model, method)  # the same batch, in float64
    from adaptkit.losses import select_pseudo_labels
    with torch.no_grad():
        z0 = model(b.x_tgt, domain="target")
        labels, keep = select_pseudo_labels(torch.softmax(z0, 1), method.options.threshold)
        assert keep.any()
        before = torch.nn.functional.cross_entropy(z0[keep], labels[keep])
    _sgd_step(_update(method, "self_train"), b, model, method, lr=0.05)  # asserts only encoder+head moved
    with torch.no_grad():
        # the step minimises CE on the kept rows with their (fixed) pseudo-labels (Lee, ICML 2013 workshop)
        after = torch.nn.functional.cross_entropy(model(b.x_tgt, domain="target")[keep], labels[keep])
    assert after < before


def test_self_training_bad_options():
    with pytest.raises(ValueError, match=re.escape(
            "The 'threshold' parameter of method 'self_training' must be in the range [0, 1]. Got 1.5 instead.")):
        _make("self_training", threshold=1.5)
    with pytest.raises(TypeError, match=re.escape(
            "The 'class_balanced' parameter of method 'self_training' must be true or false. Got 'yes' instead.")):
        _make("self_training", class_balanced="yes")
