"""User modules named in ``imports`` are imported in every process: a shift registered in the user's own module is
used by a grid's worker processes, by ``fit`` and by the CLI; a grid that could not register it in its workers is
refused before anything trains, naming the module."""
import json
import os
import subprocess
import sys
import textwrap

import pytest

import adaptkit
from adaptkit.bench.grid import run_grid
from adaptkit.bench.plan import plan_grid
from adaptkit.data.shifts import SHIFTS

from .helpers import NET

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
MODULE = "adaptkit_test_user_shifts"  # a name no installed package has
SHIFT = "user_blobs"

SOURCE = textwrap.dedent(f'''
    """A user's own shift module: registers {SHIFT!r} and records which processes imported it."""
    import os
    from pathlib import Path

    from adaptkit.data.shifts import SHIFTS, shifted_blobs

    with open(Path(__file__).with_name("imported_by.txt"), "a") as f:
        f.write(f"{{os.getpid()}}\\n")


    @SHIFTS.register({SHIFT!r})
    def user_blobs(seed: int = 0, n_source: int = 60, n_target: int = 60):
        pair = shifted_blobs(seed=seed, n_source=n_source, n_target=n_target, n_features=3)
        pair.name = {SHIFT!r}
        return pair
''')


@pytest.fixture(scope="module")
def user_module(tmp_path_factory):
    folder = tmp_path_factory.mktemp("user_module")
    (folder / f"{MODULE}.py").write_text(SOURCE)
    sys.path.insert(0, str(folder))
    yield folder
    sys.path.remove(str(folder))
    sys.modules.pop(MODULE, None)
    SHIFTS._table.pop(SHIFT, None)
    from hydra.core.config_store import ConfigStore  # the schema registered for it, so later tests see none

    ConfigStore.instance().repo.get("data", {}).pop(f"{SHIFT}.yaml", None)


def _pids(folder):
    return {int(line) for line in (folder / "imported_by.txt").read_text().split()}


def test_a_bench_worker_process_sees_a_user_registered_shift(user_module, tmp_path):
    assert SHIFT not in SHIFTS  # nothing has imported the module yet: only `imports` will
    result = run_grid(imports=[MODULE], methods=["source_only", "coral"], shifts=[SHIFT], seeds=[0],
                      recipes={SHIFT: NET}, workers=2, out_dir=str(tmp_path / "grid"), verbose=False)
    assert [r["status"] for r in result.rows] == ["ok", "ok"], result.rows
    for r in result.rows:
        summary = json.loads((tmp_path / "grid" / "cells" / SHIFT / r["method"] / "seed0" / "summary.json").read_text())
        assert summary["data"] == SHIFT
    # the cells trained in worker processes, and those processes imported the module themselves
    assert _pids(user_module) - {os.getpid()}


def test_a_user_shift_not_named_in_imports_is_refused_for_parallel_workers(user_module, tmp_path):
    __import__(MODULE)  # registered in this process only: the workers would not know it
    grid = dict(methods=["source_only", "coral"], shifts=[SHIFT], seeds=[0], recipes={SHIFT: NET},
                out_dir=str(tmp_path / "g"), verbose=False)
    with pytest.raises(ValueError, match=f"The shift '{SHIFT}' is registered by module '{MODULE}', which the bench "
                                         rf"config's imports do not name; .* Add imports=\[{MODULE}\]"):
        run_grid(workers=2, **grid)
    assert not (tmp_path / "g" / "cells").exists()  # refused before any cell folder was written
    result = run_grid(workers=1, **grid)  # one worker: the cells run in this process, which knows it
    assert [r["status"] for r in result.rows] == ["ok", "ok"]


def test_unimportable_module_is_one_error_naming_it(tmp_path):
    with pytest.raises(ImportError, match="The 'imports' setting of the bench config names module 'no_such_mod_x'"):
        plan_grid(imports=["no_such_mod_x"], methods=["source_only"], shifts=["rotated_moons"], seeds=[0],
                  out_dir=str(tmp_path / "g"))
    with pytest.raises(ImportError, match="The 'imports' setting of the run settings names module 'no_such_mod_x'"):
        adaptkit.fit("rotated_moons", imports=["no_such_mod_x"], steps=2)


def test_fit_and_the_cli_import_the_users_module(user_module, tmp_path):
    run = adaptkit.fit(SHIFT, imports=[MODULE], steps=4, batch_size=8, progress=False)
    assert run.summary["data"] == SHIFT
    env = {**os.environ, "OMP_NUM_THREADS": "1", "HYDRA_FULL_ERROR": "0", "PYTHONPATH": os.path.join(ROOT, "src")}
    rd = tmp_path / "cli"
    out = subprocess.run([sys.executable, "-c", "from adaptkit.cli import train_main; train_main()",
                          f"imports=[{MODULE}]", f"data={SHIFT}", "data.n_source=40", "steps=4", "batch_size=8",
                          f"run_dir={rd}", "diagnostics=false"],
                         capture_output=True, text=True, env=env, cwd=user_module, timeout=300)
    assert out.returncode == 0, out.stderr[-2000:]
    assert json.loads((rd / "summary.json").read_text())["data"] == SHIFT
    assert "imports:\n- " + MODULE in (rd / "config.yaml").read_text()  # load_run imports it again
