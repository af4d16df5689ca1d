"""The user's own table (``data=table``): what it loads is what numpy reads from the same file, its splits are the
bundled shifts' splits, target labels are for scoring only, and every error names the file and the column."""
import json
import os
import re
import subprocess
import sys

import numpy as np
import pytest
import torch

import adaptkit
from adaptkit.data import DomainPair, make_shift

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))


def _table(rng, n=60, n_features=3, shift=2.0):
    """Rows (features..., domain 0/1, label) where the target (domain 1) is the source moved by ``shift``."""
    d = (np.arange(n) % 2).astype(float)
    x = rng.normal(size=(n, n_features)) + shift * d[:, None]
    y = (x[:, 0] - shift * d > 0).astype(float)
    return x, d, y


def _write_csv(path, header, rows):
    with open(path, "w") as f:
        f.write(",".join(header) + "\n")
        for r in rows:
            f.write(",".join(r) + "\n")


@pytest.fixture
def csv_table(tmp_path):
    x, d, y = _table(np.random.default_rng(0))
    path = tmp_path / "sites.csv"
    _write_csv(path, ["f0", "f1", "f2", "site", "y"],
               [[repr(float(v)) for v in row[:3]] + [str(int(row[3])), str(int(row[4]))] for row in np.c_[x, d, y]])
    return path


def _all_source(pair):
    return torch.cat([pair.source_train.x, pair.source_val.x]).numpy(), torch.cat(
        [pair.source_train.y, pair.source_val.y]).numpy()


def _sorted_rows(a):
    return a[np.lexsort(a.T[::-1])]


def test_csv_with_a_domain_column_is_what_numpy_loadtxt_reads_split_as_domainpair_splits(csv_table):
    pair = make_shift("table", path=str(csv_table), label="y", domain="site", source_value="0", seed=3)
    ref = np.loadtxt(csv_table, delimiter=",", skiprows=1)  # numpy's own reading of the same file
    src, tgt = ref[ref[:, 3] == 0], ref[ref[:, 3] == 1]
    # the same arrays through DomainPair with the bundled shifts' splits (split_seed = seed): bit-identical
    expected = DomainPair(src[:, :3], src[:, 4].astype(int), tgt[:, :3], tgt[:, 4].astype(int), split_seed=3)
    assert torch.equal(pair.source_train.x, expected.source_train.x)
    assert torch.equal(pair.source_val.y, expected.source_val.y)
    assert torch.equal(pair.target_train_x, expected.target_train_x)
    assert torch.equal(pair.scoring_sets()["target_test"].y, expected.scoring_sets()["target_test"].y)
    xs, ys = _all_source(pair)
    np.testing.assert_array_equal(_sorted_rows(np.c_[xs, ys]), _sorted_rows(np.c_[src[:, :3], src[:, 4]]
                                                                            .astype(np.float32)))
    # seeded: another seed draws other splits
    other = make_shift("table", path=str(csv_table), label="y", domain="site", source_value="0", seed=4)
    assert not torch.equal(other.source_train.x, pair.source_train.x)
    # target labels travel for scoring only: the training data has no field for them
    assert pair.has_target_labels and not hasattr(pair.training_data(), "target_y")


def test_two_npy_files_and_label_by_index_match_np_load(tmp_path):
    rng = np.random.default_rng(1)
    xs, _, ys = _table(rng, shift=0.0)
    xt = rng.normal(size=(25, 3)) + 1.5
    np.save(tmp_path / "s.npy", np.c_[ys, xs])  # label first: column 0
    np.save(tmp_path / "t.npy", np.c_[-np.ones(25), xt])  # -1: unknown target labels
    pair = make_shift("table", path=str(tmp_path / "s.npy"), label="0", target_path=str(tmp_path / "t.npy"),
                      target_test_fraction=0.2, seed=0)
    a, b = np.load(tmp_path / "s.npy"), np.load(tmp_path / "t.npy")
    expected = DomainPair(a[:, 1:], a[:, 0].astype(int), b[:, 1:], target_test_fraction=0.2)
    assert torch.equal(pair.source_train.x, expected.source_train.x)
    assert torch.equal(pair.target_test_x, expected.target_test_x)
    assert not pair.has_target_labels and pair.scoring_sets().keys() == {"source_val"}


def test_npz_keeps_an_image_array_with_its_shape(tmp_path):
    rng = np.random.default_rng(2)
    images, label, dom = rng.random((40, 1, 4, 4)), np.arange(40) % 3, (np.arange(40) >= 24).astype(int)
    np.savez(tmp_path / "img.npz", images=images, label=label, dom=dom)
    pair = make_shift("table", path=str(tmp_path / "img.npz"), label="label", domain="dom", source_value="0")
    assert pair.input_shape == (1, 4, 4) and pair.n_classes == 3
    z = np.load(tmp_path / "img.npz")
    expected = DomainPair(z["images"][:24], z["label"][:24], z["images"][24:], z["label"][24:])
    assert torch.equal(pair.source_train.x, expected.source_train.x)


def test_empty_labels_are_unknown_and_target_value_selects_rows(tmp_path):
    path = tmp_path / "t.csv"
    rows = [["0.1", "a", "0"], ["0.9", "a", "1"], ["0.2", "a", "0"], ["0.8", "a", "1"],
            ["0.3", "b", ""], ["0.7", "b", "-1"], ["0.5", "c", "1"]]
    _write_csv(path, ["x", "site", "y"], rows)
    pair = make_shift("table", path=str(path), label="y", domain="site", source_value="a", target_value="b",
                      target_test_fraction=0.5)
    assert len(pair.target_train_x) + len(pair.target_test_x) == 2  # the 'c' row is neither domain
    assert not pair.has_target_labels


@pytest.mark.parametrize("kwargs, message", [
    (dict(path="missing.csv"), r"table 'missing.csv': no such file"),
    (dict(label="outcome"), r"table '.*sites.csv': no column 'outcome' \(the label\); columns: f0, f1, f2, site, y"),
    (dict(domain="place"), r"no column 'place' \(the domain\)"),
    (dict(source_value="9"), r"no row has '9' in column 'site' \(the source_value\); its values: '0', '1'"),
    (dict(features=["f0", "nope"]), r"no column 'nope' \(a feature\)"),
])
def test_errors_name_the_file_and_the_column(csv_table, kwargs, message):
    options = {**dict(path=str(csv_table), label="y", domain="site", source_value="0"), **kwargs}
    with pytest.raises(ValueError, match=message):
        make_shift("table", **options)


def test_non_numeric_values_and_one_class_fail_naming_the_column(tmp_path):
    path = tmp_path / "bad.csv"
    _write_csv(path, ["x", "colour", "y"], [["1", "red", "0"], ["2", "blue", "1"], ["3", "red", "0"]])
    with pytest.raises(ValueError, match=r"bad.csv': column 'colour' holds the non-numeric value 'red' in data row 1"):
        make_shift("table", path=str(path), label="y", target_path=str(path))
    _write_csv(path, ["x", "y"], [["1", "0"], ["2", "cat"]])
    with pytest.raises(ValueError, match=r"label column 'y' holds 'cat' in data row 2"):
        make_shift("table", path=str(path), label="y", target_path=str(path))
    _write_csv(path, ["x", "y"], [["1", "0"], ["2", "0"]])
    with pytest.raises(ValueError, match=r"bad.csv': the source rows hold one class only \(0\) in column 'y'"):
        make_shift("table", path=str(path), label="y", target_path=str(path))
    with pytest.raises(ValueError, match=re.escape("set exactly one of data.domain")):
        make_shift("table", path=str(path), label="y")


def test_fit_trains_on_the_table(csv_table, tmp_path):
    options = dict(path=str(csv_table), label="y", domain="site", source_value="0")
    run = adaptkit.fit("table", data_options=options, method="coral", steps=6, batch_size=8, progress=False,
                       run_dir=str(tmp_path / "run"))
    assert run.summary["data"] == "table" and run.summary["steps"] == 6
    assert run.summary["target_accuracy"] is not None  # the file's target labels, used for scoring


def test_cli_trains_on_the_table(csv_table, tmp_path):
    rd = tmp_path / "cli_run"
    env = {**os.environ, "OMP_NUM_THREADS": "1", "HYDRA_FULL_ERROR": "0", "PYTHONPATH": os.path.join(ROOT, "src")}
    cmd = [sys.executable, "-c", "from adaptkit.cli import train_main; train_main()", "data=table",
           f"data.path={csv_table}", "data.label=y", "data.domain=site", "data.source_value=0", "steps=4",
           "batch_size=8", f"run_dir={rd}", "diagnostics=false"]
    out = subprocess.run(cmd, capture_output=True, text=True, env=env, cwd=tmp_path, timeout=300)
    assert out.returncode == 0, out.stderr[-2000:]
    summary = json.loads((rd / "summary.json").read_text())
    assert summary["data"] == "table" and summary["steps"] == 4
    bad = subprocess.run(cmd[:4] + ["data.path=nowhere.csv", "data.label=y", "data.domain=site",
                                    "data.source_value=0", "steps=4", f"run_dir={tmp_path / 'r2'}"],
                         capture_output=True, text=True, env=env, cwd=tmp_path, timeout=300)
    assert bad.returncode != 0 and "table 'nowhere.csv': no such file" in bad.stderr


def test_the_config_hash_follows_the_table_file_contents(tmp_path):
    """A changed file is another run, though its settings read the same (the hash covers the file's bytes)."""
    import hashlib

    from adaptkit.config import RunConfig, config_hash, resolve
    from adaptkit.data.table import files_digest

    path = tmp_path / "t.csv"
    rows = ["x1,x2,y,site"] + [f"{i % 7}.5,{i % 3},{i % 2},{'A' if i < 20 else 'B'}" for i in range(40)]
    path.write_text("\n".join(rows) + "\n")
    entry = {"name": "table", "path": str(path), "label": "y", "domain": "site", "source_value": "A"}

    def h():
        return config_hash(resolve(RunConfig(data=dict(entry))))

    first = h()
    # the digest is SHA-256 over the parameter's name and the file's bytes (hashlib, by hand)
    assert files_digest(resolve(RunConfig(data=dict(entry))).data) == hashlib.sha256(
        b"path\0" + path.read_bytes() + b"\0").hexdigest()
    path.write_text("\n".join(rows) + "\n")  # rewritten, same bytes: the same run
    assert h() == first
    path.write_text("\n".join(rows[:-1] + ["9.5,1,1,B"]) + "\n")  # one cell changed
    assert h() != first


def test_a_parquet_file_reads_as_the_same_csv_does(tmp_path, csv_table):
    pa = pytest.importorskip("pyarrow")
    import pyarrow.parquet as pq

    ref = np.loadtxt(csv_table, delimiter=",", skiprows=1)  # numpy's reading of the CSV: the reference
    # the same table as Parquet (pyarrow writes it), the site as text, one target label missing (null)
    y = pa.array([None if i == 1 else int(v) for i, v in enumerate(ref[:, 4])], type=pa.int64())
    t = pa.table({"f0": ref[:, 0], "f1": ref[:, 1], "f2": ref[:, 2],
                  "site": pa.array(["A" if v == 0 else "B" for v in ref[:, 3]]), "y": y})
    pq.write_table(t, tmp_path / "sites.parquet")
    got = make_shift("table", path=str(tmp_path / "sites.parquet"), label="y", domain="site", source_value="A", seed=3)
    src, tgt = ref[ref[:, 3] == 0], ref[ref[:, 3] == 1]
    tgt_y = tgt[:, 4].astype(int)
    tgt_y[0] = -1  # row 1 of the file is the first target row (site B): its null label is unknown
    want = DomainPair(src[:, :3], src[:, 4].astype(int), tgt[:, :3], tgt_y, split_seed=3)
    assert torch.equal(got.source_train.x, want.source_train.x)
    assert torch.equal(got.source_val.y, want.source_val.y)
    assert torch.equal(got.target_train_x, want.target_train_x)
    assert torch.equal(got.scoring_sets()["target_test"].y, want.scoring_sets()["target_test"].y)


def test_a_parquet_feature_with_a_missing_value_is_named(tmp_path):
    pa = pytest.importorskip("pyarrow")
    import pyarrow.parquet as pq

    pq.write_table(pa.table({"f0": [1.0, None, 3.0, 4.0], "y": [0, 1, 0, 1]}), tmp_path / "t.parquet")
    with pytest.raises(ValueError, match=r"table '.*t.parquet': column 'f0' holds an empty cell in data row 2"):
        make_shift("table", path=str(tmp_path / "t.parquet"), label="y", target_path=str(tmp_path / "t.parquet"))
