"""The run setting ``target_terms``: entropy minimisation and information maximisation added to any method.

Checked against scipy.stats.entropy (the terms' values) and by one SGD step (the direction: the term it adds goes
down); the update that receives the term is the first one of each stage that trains an encoder, never a
discriminator's or a second head's.
"""
import numpy as np
import pytest
import torch
from scipy.stats import entropy

from adaptkit.config import RunConfig, resolve
from adaptkit.data.batches import Batch
from adaptkit.methods import Progress, build_method
from adaptkit.losses import weighted_cross_entropy

from .test_method_updates import _attach, _batch

T = Progress(step=5, stage="train", stage_step=5, p=0.5)


def _probs(model, x):
    with torch.no_grad():
        return torch.softmax(model(x, domain="target"), 1).numpy()


def _update_with_terms(name, terms, schedule="constant"):
    method = build_method(name)
    model = _attach(method)
    method.add_target_terms(terms, schedule)
    stages = method.training_stages()
    return method, model, stages


@pytest.mark.parametrize("term", ["entropy", "info_max"])
def test_the_added_term_is_the_formula_on_the_target_predictions(term):
    method, model, stages = _update_with_terms("source_only", {term: 0.7})
    b = _batch()
    value, logs = stages[0].updates[0].loss(b, T)
    p = _probs(model, b.x_tgt)
    mean_h = np.mean([entropy(row) for row in p])  # scipy: H(p_i) in nats
    expected_term = mean_h if term == "entropy" else mean_h - entropy(p.mean(0))  # E H(p) − H(E p) (Liang et al. 2020)
    ce = weighted_cross_entropy(model(b.x_src, domain="source"), b.y_src, None)
    assert float(logs[f"target_{term}"]) == pytest.approx(expected_term, rel=1e-5, abs=1e-6)
    assert float(value.detach()) == pytest.approx(float(ce.detach()) + 0.7 * expected_term, rel=1e-5)


def test_one_step_lowers_the_target_entropy_it_adds():
    """A sign flip (maximising entropy) would raise it: the fast check of the term's direction."""
    method, model, stages = _update_with_terms("source_only", {"entropy": 50.0})
    b = _batch()
    update = stages[0].updates[0]
    before = np.mean([entropy(r) for r in _probs(model, b.x_tgt)])
    opt = torch.optim.SGD(update.parameters(), lr=0.05)
    opt.zero_grad()
    update.loss(b, T)[0].backward()
    opt.step()
    after = np.mean([entropy(r) for r in _probs(model, b.x_tgt)])
    assert after < before


def test_the_term_goes_to_the_encoder_update_not_to_the_discriminator():
    _, _, stages = _update_with_terms("confusion", {"info_max": 1.0})
    b = _batch()
    logs = {u.name: u.loss(b, T)[1] for u in stages[0].updates}
    with_term = [n for n, l in logs.items() if "target_info_max" in l]
    assert len(with_term) == 1 and with_term[0] != stages[0].updates[0].name  # the first update trains the discriminator


def test_mcd_gets_the_term_in_step_a_only():
    _, _, stages = _update_with_terms("mcd", {"entropy": 1.0})
    b = _batch()
    marked = [u.name for u in stages[0].updates if "target_entropy" in u.loss(b, T)[1]]
    assert marked == [stages[0].updates[0].name]


def test_the_schedule_scales_the_term():
    method, model, stages = _update_with_terms("source_only", {"entropy": 1.0}, "dann_ramp")
    b = _batch()
    start = stages[0].updates[0].loss(b, Progress(0, "train", 0, 0.0))
    ce = weighted_cross_entropy(model(b.x_src, domain="source"), b.y_src, None)
    assert float(start[0].detach()) == pytest.approx(float(ce.detach()), rel=1e-6)  # dann_ramp(0) = 0 (Ganin et al. 2016)


@pytest.mark.parametrize("bad, match", [({"entropyy": 1.0}, "target_terms"), ({"entropy": -1.0}, "target_terms.entropy")])
def test_bad_terms_are_refused_by_name(bad, match):
    with pytest.raises((ValueError, TypeError), match=match):
        resolve(RunConfig(target_terms=bad))
    with pytest.raises(ValueError, match="target_terms_schedule"):
        resolve(RunConfig(target_terms={"entropy": 1.0}, target_terms_schedule="cosine"))


def test_a_run_with_terms_trains_and_logs_them(tmp_path):
    import yaml

    import adaptkit

    run = adaptkit.fit("rotated_moons", method="dann", steps=20, eval_every=10, progress=False, device="cpu",
                       target_terms={"info_max": 0.3}, run_dir=tmp_path / "run", diagnostics=False)
    assert np.isfinite(run.history[-1]["adversarial/target_info_max"])  # logged under DANN's one update
    assert yaml.safe_load((tmp_path / "run" / "config.yaml").read_text())["target_terms"] == {"info_max": 0.3}
