"""Atomic writes: a write that dies at any point leaves the previous file, whole and loadable.

The pattern is write-to-a-temporary-in-the-same-folder, fsync, ``os.replace``: POSIX ``rename(2)`` replaces the
destination atomically ("If newpath already exists, it will be atomically replaced", Linux man-pages rename(2);
Python docs, ``os.replace``: "If successful, the renaming will be an atomic operation").
"""
from __future__ import annotations

import json
import os
import signal
import stat
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest
import torch

from adaptkit import fit
from adaptkit.train import files
from adaptkit.train.loop import load_checkpoint
from tests.conftest import moons_pair
from tests.train.test_resume import _env, assert_same_run


def _temporaries(folder: Path):
    return sorted(p.name for p in Path(folder).iterdir() if p.name.endswith(".tmp"))


def test_write_replaces_whole_files_with_the_usual_mode(tmp_path):
    files.write_json(tmp_path / "a.json", {"x": 1})
    files.write_json(tmp_path / "a.json", {"x": 2})
    assert json.loads((tmp_path / "a.json").read_text()) == {"x": 2}
    umask = os.umask(0)
    os.umask(umask)
    assert stat.S_IMODE((tmp_path / "a.json").stat().st_mode) == 0o666 & ~umask  # not mkstemp's 0600
    assert _temporaries(tmp_path) == []


@pytest.mark.parametrize("failure", [OSError(28, "No space left on device"), KeyboardInterrupt("second signal")])
def test_a_failure_between_write_and_rename_keeps_the_old_file_and_no_temporary(tmp_path, monkeypatch, failure):
    files.write_torch(tmp_path / "checkpoint.pt", {"step": 1, "w": torch.ones(3)})

    def dies(src, dst):
        assert Path(src).exists()  # fully written and fsynced: only the rename is missing
        raise failure

    monkeypatch.setattr(files.os, "replace", dies)
    with pytest.raises(type(failure)):
        files.write_torch(tmp_path / "checkpoint.pt", {"step": 2, "w": torch.zeros(3)})
    monkeypatch.undo()
    assert load_checkpoint(tmp_path / "checkpoint.pt")["step"] == 1
    assert _temporaries(tmp_path) == []


def test_a_failure_in_the_middle_of_the_write_keeps_the_old_file(tmp_path, monkeypatch):
    files.write_torch(tmp_path / "checkpoint.pt", {"step": 1, "w": torch.ones(3)})
    real_save = torch.save

    def half_then_die(obj, f):
        real_save(obj, f)
        f.truncate(f.tell() // 2)  # a torn file, as a crash mid-write would leave it
        raise KeyboardInterrupt("killed mid-write")

    monkeypatch.setattr(torch, "save", half_then_die)
    with pytest.raises(KeyboardInterrupt):
        files.write_torch(tmp_path / "checkpoint.pt", {"step": 2, "w": torch.zeros(3)})
    monkeypatch.undo()
    assert load_checkpoint(tmp_path / "checkpoint.pt")["step"] == 1
    assert _temporaries(tmp_path) == []


def test_a_failed_checkpoint_write_in_a_run_keeps_the_previous_checkpoint_and_resumes_identically(tmp_path,
                                                                                                  monkeypatch):
    pair = moons_pair(n=60)
    kw = dict(method="source_only", steps=20, batch_size=8, eval_every=4, checkpoint_every=3, seed=1,
              progress=False, device="cpu")
    fit(pair, run_dir=tmp_path / "ref", **kw)
    real_replace, writes = os.replace, []

    def third_checkpoint_fails(src, dst):
        if Path(dst).name == "checkpoint.pt":
            writes.append(dst)
            if len(writes) == 3:
                raise OSError(5, "Input/output error")
        return real_replace(src, dst)

    rd = tmp_path / "run"
    monkeypatch.setattr(files.os, "replace", third_checkpoint_fails)
    with pytest.raises(OSError, match="Input/output error"):
        fit(pair, run_dir=rd, **kw)
    monkeypatch.undo()
    assert load_checkpoint(rd / "checkpoint.pt")["step"] == 6  # the second periodic checkpoint
    assert _temporaries(rd) == [] and not (rd / "summary.json").exists()
    fit(pair, run_dir=rd, **kw)
    assert_same_run(rd, tmp_path / "ref")


@pytest.mark.slow  # a subprocess importing torch
def test_a_process_killed_between_write_and_rename_leaves_a_resumable_folder(tmp_path):
    """A real SIGKILL (no clean-up runs) right before the rename of the third checkpoint: the previous checkpoint
    is intact, the orphaned temporary is removed when the run resumes, and the result equals an uninterrupted run."""
    kw = dict(method="source_only", steps=20, batch_size=8, eval_every=4, checkpoint_every=3, seed=1,
              progress=False, device="cpu")
    script = textwrap.dedent(f"""
        import os, signal, sys
        from pathlib import Path
        sys.path.insert(0, {str(Path(__file__).resolve().parents[2])!r})
        from tests.conftest import moons_pair
        from adaptkit import fit
        from adaptkit.train import files
        real, n = os.replace, []
        def replace(src, dst):
            if Path(dst).name == "checkpoint.pt":
                n.append(dst)
                if len(n) == 3:
                    os.kill(os.getpid(), signal.SIGKILL)
            return real(src, dst)
        files.os.replace = replace
        fit(moons_pair(n=60), run_dir={str(tmp_path / "run")!r}, **{kw!r})
    """)
    res = subprocess.run([sys.executable, "-c", script], env=_env(), capture_output=True, text=True, timeout=120)
    assert res.returncode == -signal.SIGKILL, res.stderr[-3000:]
    rd = tmp_path / "run"
    left = _temporaries(rd)
    assert len(left) == 1 and left[0].startswith(".checkpoint.pt.")  # a hard kill skips every clean-up
    assert load_checkpoint(rd / "checkpoint.pt")["step"] == 6

    pair = moons_pair(n=60)
    fit(pair, run_dir=tmp_path / "ref", **kw)
    fit(pair, run_dir=rd, **kw)
    assert _temporaries(rd) == []
    assert_same_run(rd, tmp_path / "ref")


def test_remove_temporaries_touches_only_its_own_names(tmp_path):
    own = tmp_path / ".checkpoint.pt.ab_3x9zq.tmp"
    keep = [tmp_path / "notes.tmp", tmp_path / ".notes.tmp", tmp_path / "checkpoint.pt"]
    for p in [own, *keep]:
        p.write_text("x")
    (tmp_path / ".dir.abcdefgh.tmp").mkdir()
    assert files.remove_temporaries(tmp_path) == [own.name]
    assert all(p.exists() for p in keep) and (tmp_path / ".dir.abcdefgh.tmp").is_dir()
    assert files.remove_temporaries(tmp_path / "absent") == []


def test_a_folder_lock_admits_one_writer_and_dies_with_its_holder(tmp_path):
    import subprocess
    import sys

    from adaptkit.train.files import FolderBusy, FolderLock

    holder = subprocess.Popen([sys.executable, "-c", (
        "import sys, time; from adaptkit.train.files import FolderLock\n"
        f"with FolderLock({str(tmp_path)!r}, what='run folder'):\n"
        "    print('locked', flush=True); time.sleep(60)")], stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout.readline().strip() == "locked"
        with pytest.raises(FolderBusy, match=rf"run folder '{tmp_path}' is in use by process {holder.pid} on "):
            with FolderLock(tmp_path, what="run folder"):
                pass
    finally:
        holder.kill()  # SIGKILL: no clean-up runs; the operating system releases the lock
        holder.wait()
    with FolderLock(tmp_path, what="run folder"):  # free again
        with pytest.raises(FolderBusy):  # and exclusive within one process too (a second open file)
            with FolderLock(tmp_path):
                pass


def test_remove_temporaries_looks_in_every_sub_folder(tmp_path):
    """A kill while ``plots/features.png`` was being written leaves its temporary in ``plots/``, not at the top."""
    deep = [tmp_path / "plots" / ".features.png.k2j4h6g8.tmp", tmp_path / "a" / "b" / ".x.json.abcdefgh.tmp"]
    keep = [tmp_path / "plots" / "features.png", tmp_path / "plots" / "notes.tmp"]
    for p in deep + keep:
        p.parent.mkdir(parents=True, exist_ok=True)
        p.write_text("x")
    assert files.remove_temporaries(tmp_path) == ["a/b/.x.json.abcdefgh.tmp", "plots/.features.png.k2j4h6g8.tmp"]
    assert not any(p.exists() for p in deep) and all(p.exists() for p in keep)
