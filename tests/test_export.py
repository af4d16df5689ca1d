"""adaptkit.export_run: the predictor written by torch's own exporter (torch.export.export / torch.export.save), read
back with torch.export.load, gives the live run's predictions on the CPU within float tolerance, for any batch size."""
import numpy as np
import pytest
import torch

import adaptkit

MOONS = {"n_source": 120, "n_target": 120}


def _reloaded(path):
    return torch.export.load(str(path)).module()  # torch's loader: nothing of adaptkit is needed to predict


def test_an_exported_adda_predictor_agrees_with_the_live_run(tmp_path):
    run = adaptkit.fit("rotated_moons", method="adda", steps=60, progress=False, data_options=MOONS)
    path = adaptkit.export_run(run, tmp_path / "model.pt2")
    program = _reloaded(path)
    x = torch.cat([run.data.target_test_x, run.data.target_train_x])
    with torch.no_grad():
        for rows in (x, x[:1], x[:7]):  # the batch size is free in the exported program
            torch.testing.assert_close(program(rows).numpy(), run.predict_proba(rows.numpy()), rtol=1e-5, atol=1e-6)
        # the exported network is the target side: head(M_t(x)), not head(M_s(x)) (torch, by hand)
        source_side = torch.softmax(run.model.head(run.model.source_encoder(x)), 1)
        assert not torch.allclose(program(x), source_side, atol=1e-4)


def test_a_dropout_head_is_exported_in_evaluation_mode_from_a_run_folder(tmp_path):
    run = adaptkit.fit("rotated_moons", method="adr", steps=30, progress=False, data_options=MOONS,
                       run_dir=str(tmp_path / "run"), diagnostics=False)
    assert any(isinstance(m, torch.nn.Dropout) for m in run.model.head.modules())  # ADR's head: dropout first
    path = adaptkit.export_run(tmp_path / "run", tmp_path / "model.pt2")  # loaded with load_run, then exported
    program = _reloaded(path)
    x = run.data.target_test_x
    with torch.no_grad():
        first, second = program(x), program(x)
    assert torch.equal(first, second)  # no dropout noise: evaluation mode is in the program
    torch.testing.assert_close(first.numpy(), run.predict_proba(x.numpy()), rtol=1e-5, atol=1e-6)
    np.testing.assert_allclose(first.sum(1).numpy(), 1.0, rtol=1e-6)  # probabilities


def test_export_refuses_a_bad_domain_or_a_one_row_example(tmp_path):
    run = adaptkit.fit("rotated_moons", method="source_only", steps=5, progress=False, data_options=MOONS)
    with pytest.raises(ValueError, match="The 'domain' parameter of export_run must be 'source' or 'target'. "
                                         "Got 'tgt' instead."):
        adaptkit.export_run(run, tmp_path / "m.pt2", domain="tgt")
    with pytest.raises(ValueError, match=r"at least 2 rows .* got shape \(1, 2\)"):
        adaptkit.export_run(run, tmp_path / "m.pt2", example=np.zeros((1, 2)))
    assert not (tmp_path / "m.pt2").exists()
