"""One writer per grid folder, and grid workers that die with their parent (issue 13, case 1).

A *slow* grid (cells of 200,000 steps of a 16-unit MLP: minutes each) is started in a subprocess; the tests act on it
while its cells train and then kill it. Every wait is bounded; the subprocess is killed in a ``finally``."""
import os
import re
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from adaptkit import cli
from adaptkit.bench.grid import run_grid
from adaptkit.train.files import FolderBusy

from .helpers import NET, MOONS, tiny

SLOW = {**NET, "steps": 200_000, "eval_every": 100_000}  # a cell that outlives every test here
ENV = {**os.environ, "OMP_NUM_THREADS": "1", "HYDRA_FULL_ERROR": "0"}


def start_slow_grid(out: Path, workers: int) -> subprocess.Popen:
    """A grid of ``workers`` slow cells in a subprocess; returns once every cell has started training."""
    settings = tiny(out, methods=["source_only"], shifts=[MOONS], seeds=list(range(workers)),
                    recipes={"rotated_moons": SLOW}, workers=workers)
    proc = subprocess.Popen([sys.executable, "-c", f"from adaptkit.bench.grid import run_grid; run_grid(**{settings!r})"],
                            env=ENV, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    cells = [out / "cells" / "rotated_moons" / "source_only" / f"seed{k}" for k in range(workers)]
    deadline = time.monotonic() + 120
    # a cell trains once its run folder holds config.yaml (written by the worker just before the first step)
    while not all((c / "config.yaml").exists() for c in cells):
        if proc.poll() is not None or time.monotonic() > deadline:
            proc.kill()
            raise AssertionError(f"the slow grid did not start its cells: {proc.communicate()[1].decode()[-2000:]}")
        time.sleep(0.2)
    return proc


def _alive(pid: int) -> bool:
    """Whether ``pid`` runs (a zombie — dead, not yet reaped by whoever adopted it — counts as gone). Reads
    /proc/<pid>/stat, whose third field is the state letter (proc(5))."""
    try:
        stat = Path(f"/proc/{pid}/stat").read_text()
    except OSError:
        return False
    return stat.rsplit(")", 1)[1].split()[0] not in ("Z", "X")


def _children(pid: int):
    """The pids whose parent is ``pid`` (the fourth field of /proc/<pid>/stat, proc(5))."""
    out = []
    for d in Path("/proc").iterdir():
        if d.name.isdigit():
            try:
                fields = (d / "stat").read_text().rsplit(")", 1)[1].split()
            except OSError:
                continue
            if int(fields[1]) == pid and fields[0] not in ("Z", "X"):
                out.append(int(d.name))
    return out


def _workers(pid: int):
    """The loky worker processes of ``pid`` (their command line runs loky's worker entry point)."""
    found = []
    for child in _children(pid):
        try:
            cmd = Path(f"/proc/{child}/cmdline").read_bytes().replace(b"\0", b" ").decode()
        except OSError:
            continue
        if "loky" in cmd and "resource_tracker" not in cmd:
            found.append(child)
    return found


def _stop(proc: subprocess.Popen) -> None:
    if proc.poll() is None:
        proc.kill()
    proc.wait(timeout=30)


def test_a_second_writer_of_a_grid_folder_fails_at_once_naming_the_holder(tmp_path, monkeypatch, capsys):
    out = tmp_path / "grid"
    proc = start_slow_grid(out, workers=1)
    try:
        holder = rf"process {proc.pid} on \S+ \(.*\), started \d{{4}}-\d\d-\d\d \d\d:\d\d:\d\d"
        t0 = time.monotonic()
        with pytest.raises(FolderBusy, match=rf"^grid folder '{re.escape(str(out))}' is in use by {holder}; "):
            run_grid(**tiny(out))  # other settings, even: refused before any cell folder is looked at
        assert time.monotonic() - t0 < 30  # at once: no waiting for the holder

        # the command line: one line, the holder named, the "try again later" status; nothing of the first touched
        before = {p: p.stat().st_mtime_ns for p in out.rglob("*") if p.name in ("cell.json", "config.yaml")}
        monkeypatch.setattr(sys, "argv", ["adaptkit-bench", "bench=tiny", f"out_dir={out}", "workers=1",
                                          "overwrite=true", f"hydra.run.dir={tmp_path / 'h'}"])
        monkeypatch.setenv("HYDRA_FULL_ERROR", "0")
        with pytest.raises(SystemExit) as e:
            cli.bench_main()
        err = capsys.readouterr().err.strip().splitlines()
        assert e.value.code == cli.EXIT_INTERRUPTED
        assert len(err) == 1 and re.match(rf"adaptkit-bench: error: grid folder '{re.escape(str(out))}' is in use by "
                                          rf"{holder}", err[0]), err
        assert proc.poll() is None  # the first grid goes on
        assert all(p.exists() and p.stat().st_mtime_ns == t for p, t in before.items())  # overwrite=true deleted nothing
    finally:
        _stop(proc)
    # the holder was SIGKILLed: the operating system released the lock, and the folder is free again
    result = run_grid(**tiny(out, methods=["source_only"], shifts=[MOONS], seeds=[0], overwrite=True))
    assert result.counts == {"ok": 1}


def test_grid_workers_die_with_a_sigkilled_parent_without_writing_a_result(tmp_path):
    """``kill -9`` of the grid process (what ``timeout -s KILL`` does) used to leave its loky workers training and
    then writing the summaries of the old settings into the folder (issue 13, case 1). Each worker now watches
    its parent (prctl(PR_SET_PDEATHSIG) on Linux, man prctl(2); a polling thread elsewhere) and ends with it."""
    out = tmp_path / "grid"
    proc = start_slow_grid(out, workers=2)
    workers, left = [], []
    try:
        deadline = time.monotonic() + 30
        while len(_workers(proc.pid)) < 2 and time.monotonic() < deadline:
            time.sleep(0.2)
        workers = _workers(proc.pid)
        assert len(workers) >= 2, f"expected 2 loky workers under {proc.pid}, found {workers}"
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait(timeout=30)
        deadline = time.monotonic() + 10
        while any(_alive(w) for w in workers) and time.monotonic() < deadline:
            time.sleep(0.1)
        left = [w for w in workers if _alive(w)]
    finally:
        _stop(proc)
        for w in [w for w in workers if _alive(w)]:
            try:
                os.kill(w, signal.SIGKILL)  # only the test's own grandchildren, by id
            except OSError:
                pass
    assert not left, f"workers {left} outlived their SIGKILLed parent by 10 s"
    cells = sorted((out / "cells").rglob("seed*"))
    assert len(cells) == 2 and not any((c / "summary.json").exists() or (c / "failure.json").exists() for c in cells)


def test_the_portable_watch_ends_a_process_whose_watched_process_died():
    """The fallback that works without prctl: a process watching another that is not its parent (so only the
    polling thread can notice) exits with ORPHANED within a few polls of that process's death."""
    from adaptkit.bench.cell import ORPHANED, WATCH_SECONDS

    watched = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(60)"])
    watcher = subprocess.Popen([sys.executable, "-c", (
        "import sys, time; from adaptkit.bench.cell import watch_parent\n"
        f"watch_parent({watched.pid}); print('watching', flush=True); time.sleep(60)")], env=ENV,
        stdout=subprocess.PIPE, text=True)
    try:
        assert watcher.stdout.readline().strip() == "watching"
        assert watcher.poll() is None
        watched.kill()
        watched.wait()  # reaped: a zombie would still answer os.kill(pid, 0)
        assert watcher.wait(timeout=10 * WATCH_SECONDS + 5) == ORPHANED
    finally:
        for p in (watched, watcher):
            if p.poll() is None:
                p.kill()
                p.wait()
