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
