"""One-line errors for the unlucky cases of a run, raised before training where they can be known then: a run
folder that cannot be written, a damaged summary.json, a device the machine lacks, a full disk while saving, a
batch larger than its domain (a warning, once).

A full disk is real here, not simulated: the write goes to ``/dev/full`` (Linux), whose writes fail with ENOSPC
("No space left on device", Linux man-pages full(4)) — what torch's writer and Python's file objects see on a full
file system.
"""
from __future__ import annotations

import errno
import os
import re
import shutil
import subprocess
import sys
import tempfile
import warnings
from pathlib import Path

import pytest
import torch

from adaptkit import fit
from adaptkit.train import files, loop
from adaptkit.train.files import DiskFull
from adaptkit.train.loop import load_checkpoint
from tests.conftest import moons_pair

KW = dict(method="source_only", steps=6, batch_size=8, eval_every=3, progress=False, device="cpu")


def _one_line(e: BaseException) -> str:
    text = str(e)
    assert "\n" not in text, text
    return text


def test_a_run_folder_that_cannot_be_written_is_refused_before_training(tmp_path, monkeypatch):
    (tmp_path / "a_file").write_text("x")
    bad = tmp_path / "a_file" / "run"  # below a file: mkdir fails with ENOTDIR (POSIX mkdir(2))
    trained = []
    monkeypatch.setattr(loop.Trainer, "_step", lambda self: trained.append(self.step))
    with pytest.raises(ValueError, match=re.escape(f"The 'run_dir' parameter of the run settings must be a folder "
                                                   f"that can be written. Got {str(bad)!r} instead (Not a directory")):
        fit(moons_pair(n=60), run_dir=bad, **KW)
    assert trained == []


@pytest.mark.skipif(not hasattr(os, "geteuid") or os.geteuid() == 0, reason="root writes through permission bits")
def test_a_read_only_run_folder_is_refused_at_start(tmp_path):
    rd = tmp_path / "run"
    rd.mkdir()
    rd.chmod(0o555)
    try:
        with pytest.raises(ValueError, match=re.escape(f"Got {str(rd)!r} instead (Permission denied")):
            fit(moons_pair(n=60), run_dir=rd, **KW)
    finally:
        rd.chmod(0o755)
    assert list(rd.iterdir()) == []


@pytest.mark.parametrize("text, why", [("garbage{", "is not valid JSON (Expecting value: line 1 column 1"),
                                       ("[1, 2]", "must hold a JSON object (a run summary); got a JSON list"),
                                       (b"\xff\xfe", "cannot be read")])
def test_a_damaged_summary_is_named(tmp_path, text, why):
    rd = tmp_path / "run"
    rd.mkdir()
    path = rd / "summary.json"
    path.write_bytes(text if isinstance(text, bytes) else text.encode())
    with pytest.raises(ValueError, match=re.escape(f"{path} {why}")) as e:
        fit(moons_pair(n=60), run_dir=rd, **KW)
    _one_line(e.value)
    fit(moons_pair(n=60), run_dir=rd, overwrite=True, **KW)  # overwrite starts afresh, as the message says


def test_a_device_the_machine_lacks_is_refused_listing_the_available_ones():
    n = torch.cuda.device_count() if torch.cuda.is_available() else 0  # torch's own count is the reference
    have = ", ".join(["cpu", *(f"cuda:{i}" for i in range(n))])
    with pytest.raises(ValueError, match=re.escape(f"names 'cuda:{n}', which this machine does not have ({n} CUDA "
                                                   f"device{'s' if n != 1 else ''} visible). Available devices: "
                                                   f"{have}")):
        fit(moons_pair(n=60), **{**KW, "device": f"cuda:{n}"})


def test_a_batch_larger_than_its_domain_warns_once():
    pair = moons_pair(n=60)
    n_src, n_tgt = len(pair.training_data().source_x), len(pair.training_data().target_x)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        fit(pair, **{**KW, "batch_size": 1000})
    ours = [w for w in caught if "batch_size=1000 is larger than" in str(w.message)]
    assert len(ours) == 1, [str(w.message) for w in caught]
    assert (f"the source ({n_src} training samples) and the target ({n_tgt} training samples)"
            in str(ours[0].message))
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        fit(pair, **KW)
    assert not [w for w in caught if "is larger than" in str(w.message)]


def _writes_to_dev_full(monkeypatch, name: str):
    """The temporary file behind the next write of ``name`` is /dev/full: every write to it fails with ENOSPC."""
    real = tempfile.mkstemp

    def mkstemp(prefix="", suffix="", dir=None):
        fd, tmp = real(prefix=prefix, suffix=suffix, dir=dir)
        if prefix == f".{name}.":
            full = os.open("/dev/full", os.O_WRONLY)
            os.dup2(full, fd)
            os.close(full)
        return fd, tmp

    monkeypatch.setattr(files.tempfile, "mkstemp", mkstemp)


@pytest.mark.skipif(not Path("/dev/full").exists(), reason="needs Linux's /dev/full")
@pytest.mark.parametrize("name, write", [
    ("checkpoint.pt", lambda p: files.write_torch(p, {"w": torch.ones(100_000)})),  # torch's writer
    ("summary.json", lambda p: files.write_json(p, {"x": list(range(10_000))})),  # Python's file object
])
def test_a_full_disk_names_the_file_and_the_free_space(tmp_path, monkeypatch, name, write):
    path = tmp_path / name
    path.write_bytes(b"old")
    _writes_to_dev_full(monkeypatch, name)
    with pytest.raises(DiskFull) as e:
        write(path)
    assert e.value.errno == errno.ENOSPC
    free = shutil.disk_usage(tmp_path).free / 2**30  # the reference: shutil's own figure
    text = _one_line(e.value.strerror)
    assert text.startswith(f"no space left on the device while writing {path} (")
    shown = float(re.search(r"\(([\d.]+) (GiB|MiB) free there\)", text).group(1))
    unit = re.search(r"(GiB|MiB) free there", text).group(1)
    assert abs(shown - (free if unit == "GiB" else free * 1024)) < 0.05 * max(1.0, shown)
    assert path.read_bytes() == b"old"  # the previous file is whole
    assert [p.name for p in tmp_path.iterdir()] == [name]  # and no temporary is left


@pytest.mark.skipif(not Path("/dev/full").exists(), reason="needs Linux's /dev/full")
def test_a_full_disk_in_a_run_stops_it_in_one_line_and_it_resumes(tmp_path, monkeypatch):
    rd = tmp_path / "run"
    real = files.write_torch
    calls = []

    def second_checkpoint_full(path, obj):
        calls.append(path)
        if len(calls) == 2:
            _writes_to_dev_full(monkeypatch, "checkpoint.pt")
        try:
            return real(path, obj)
        finally:
            monkeypatch.setattr(files.tempfile, "mkstemp", tempfile.mkstemp)

    monkeypatch.setattr(files, "write_torch", second_checkpoint_full)
    with pytest.raises(DiskFull, match=re.escape(f"while writing {rd / 'checkpoint.pt'}")):
        fit(moons_pair(n=60), run_dir=rd, checkpoint_every=2, **KW)
    monkeypatch.undo()
    assert load_checkpoint(rd / "checkpoint.pt")["step"] == 2  # the first checkpoint, whole
    fit(moons_pair(n=60), run_dir=rd, checkpoint_every=2, **KW)  # space again: the run resumes and finishes
    assert load_checkpoint(rd / "checkpoint.pt")["step"] == KW["steps"]


@pytest.mark.skipif(not Path("/dev/full").exists(), reason="needs Linux's /dev/full")
def test_cli_full_disk_is_one_line_with_status_74(tmp_path):
    script = tmp_path / "full.py"
    script.write_text(
        "import os, sys, tempfile\n"
        "from adaptkit.train import files\n"
        "real = tempfile.mkstemp\n"
        "def mkstemp(prefix='', suffix='', dir=None):\n"
        "    fd, tmp = real(prefix=prefix, suffix=suffix, dir=dir)\n"
        "    if prefix == '.checkpoint.pt.':\n"
        "        os.dup2(os.open('/dev/full', os.O_WRONLY), fd)\n"
        "    return fd, tmp\n"
        "files.tempfile.mkstemp = mkstemp\n"
        "sys.argv[0] = 'adaptkit-train'\n"
        "from adaptkit.cli import train_main\n"
        "train_main()\n")
    rd = tmp_path / "run"
    res = subprocess.run([sys.executable, str(script), "steps=6", "checkpoint_every=3", "progress=false",
                          "device=cpu", f"run_dir={rd}"], cwd=tmp_path, capture_output=True, text=True, timeout=120,
                         env={**os.environ, "OMP_NUM_THREADS": "1"})
    assert res.returncode == 74, res.stderr[-3000:]  # EX_IOERR (BSD sysexits.h)
    lines = [l for l in res.stderr.splitlines() if l.strip() and "Warning" not in l and not l.startswith(" ")]
    assert lines == [f"adaptkit-train: error: no space left on the device while writing {rd / 'checkpoint.pt'} "
                     + lines[0].split("checkpoint.pt ", 1)[1]], res.stderr
    assert "free there" in lines[0] and "Traceback" not in res.stderr
