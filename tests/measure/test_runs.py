import json

import numpy as np

from adaptkit import DomainPair, fit
from adaptkit.measure import proxy_a_distance


def test_diagnostics_written_to_the_run_folder(tmp_path):
    rng = np.random.default_rng(0)
    xs = rng.normal(size=(200, 3)); ys = (xs[:, 0] > 0).astype(int)
    xt = rng.normal(size=(200, 3)) + np.array([4.0, 0, 0])  # far apart in input space
    pair = DomainPair(xs, ys, xt, name="far")
    run = fit(pair, steps=20, batch_size=16, run_dir=tmp_path, diagnostics=True, progress=False, device="cpu")
    d = json.loads((tmp_path / "diagnostics.json").read_text())
    # "before" is measured on the inputs: the same number proxy_a_distance gives on them directly
    # (Ben-David et al. 2007 procedure; well separated → close to 2)
    direct = proxy_a_distance(pair.source_val.x.numpy(), pair.target_train_x.numpy(), seed=0)
    assert d["before/proxy_a_distance"] == direct and direct > 1.8
    assert d["label_shift_warning"] is None or "Predicted target class proportions" in d["label_shift_warning"]
    assert 0 <= d["source_val_ece"] <= 1
    assert json.loads((tmp_path / "summary.json").read_text())["diagnostics"] == d
    for png in ("features.png", "learning_curves.png"):
        assert (tmp_path / "plots" / png).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert run.summary["diagnostics"] == d


def mean_gap(fs, ft):
    """A user's own feature loss: squared distance between the domains' mean features."""
    return (fs.mean(0) - ft.mean(0)).pow(2).sum()


def _capture_feature_map(monkeypatch):
    import adaptkit.measure.plots as plots

    seen = {}
    real = plots.feature_map

    def spy(*args, **kwargs):
        seen["args"], seen["kwargs"] = args, kwargs
        return real(*args, **kwargs)

    monkeypatch.setattr(plots, "feature_map", spy)
    return seen


def test_features_picture_has_as_many_points_per_domain_and_target_classes(tmp_path, monkeypatch):
    # rotated_moons keeps target labels for scoring: the picture colours target points by them, and draws as many
    # source as target points (all source rows are candidates, not only the 60 validation rows)
    seen = _capture_feature_map(monkeypatch)
    run = fit("rotated_moons", steps=5, batch_size=16, run_dir=tmp_path, progress=False, device="cpu")
    bs, bt, as_, at = seen["args"]
    kw = seen["kwargs"]
    n_test = len(run.data.scoring_sets()["target_test"])
    assert len(bs) == len(bt) == len(as_) == len(at) == n_test
    assert kw["tgt_labels"] is not None and len(kw["tgt_labels"]) == n_test and kw["src_labels"] is not None
    # the target rows drawn are the labelled scoring rows, with their own labels (compared by input value)
    test = run.data.scoring_sets()["target_test"]
    assert {tuple(r) for r in bt.numpy().round(6)} == {tuple(r) for r in test.x.numpy().round(6)}
    assert sorted(kw["tgt_labels"].tolist()) == sorted(test.y.tolist())
    assert "used only for this picture" not in (kw.get("target_note") or "")  # feature_map adds that sentence
    assert kw["panel_names"] == ("inputs", "learned features at step 5")  # the state the run keeps


def test_a_users_loss_is_named_by_its_function(tmp_path, monkeypatch):
    seen = _capture_feature_map(monkeypatch)
    run = fit("rotated_moons", method=mean_gap, steps=5, batch_size=16, run_dir=tmp_path / "a", progress=False,
              device="cpu")
    assert run.summary["method"] == "mean_gap"
    assert json.loads((tmp_path / "a" / "summary.json").read_text())["method"] == "mean_gap"
    assert seen["kwargs"]["title"] == "mean_gap on rotated_moons"
    config = (tmp_path / "a" / "config.yaml").read_text()  # what rebuilds the run keeps the wrapper and the path
    assert "name: feature_loss" in config and "loss_fn: tests.measure.test_runs.mean_gap" in config
    run = fit("rotated_moons", method="feature_loss", loss_fn=mean_gap, steps=5, batch_size=16, progress=False,
              device="cpu")
    assert run.summary["method"] == "mean_gap"
    run = fit("rotated_moons", method="coral", steps=5, batch_size=16, progress=False, device="cpu")
    assert run.summary["method"] == "coral"
