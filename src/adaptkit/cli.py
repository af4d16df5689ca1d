"""Command-line entry points (hydra apps): ``adaptkit-train``, ``adaptkit-bench``, ``adaptkit-study`` and
``adaptkit-cell`` (one exported grid cell, for hydra's launchers)."""
from __future__ import annotations

import sys

import hydra
from omegaconf import DictConfig

from .config import register_configs

register_configs()

EXIT_BAD_INPUT = 2
EXIT_INTERRUPTED = 75  # EX_TEMPFAIL: try again later — the run is resumable
EXIT_IO_ERROR = 74  # EX_IOERR: a file could not be written (a full disk); the run resumes once there is space


def _run_or_exit(prog: str, fn):
    """Run ``fn()``; turn the library's errors into one line on stderr and the exit status a scheduler can read."""
    from .train.files import DiskFull, FolderBusy
    from .train.loop import DivergenceError, Interrupted

    try:
        return fn()
    except FolderBusy as e:  # another process writes there: try again when it has finished
        print(f"{prog}: error: {e}", file=sys.stderr)
        sys.exit(EXIT_INTERRUPTED)
    except DiskFull as e:  # the file and the free space named; the folder keeps its last whole files
        print(f"{prog}: error: {e.strerror}", file=sys.stderr)
        sys.exit(EXIT_IO_ERROR)
    except (ValueError, TypeError) as e:
        print(f"{prog}: error: {e}", file=sys.stderr)
        sys.exit(EXIT_BAD_INPUT)
    except Interrupted as e:
        print(f"{prog}: {e}", file=sys.stderr)
        sys.exit(EXIT_INTERRUPTED)
    except KeyboardInterrupt as e:  # a second SIGTERM/SIGINT: stopped at once; folders keep their last checkpoint
        print(f"{prog}: {e}", file=sys.stderr)
        sys.exit(130)
    except DivergenceError as e:
        print(f"{prog}: diverged: {e}", file=sys.stderr)
        sys.exit(1)


def _rank() -> int:
    """This process's rank under torchrun (0 in one process): only rank 0 writes and reports."""
    from .train.distributed import rank

    return rank()


_WARNED = False  # whether this process has printed the adaptation warning


def _train(cfg: DictConfig):
    from hydra.core.hydra_config import HydraConfig

    from .config import from_composed
    from .run import train
    from .safety import ADAPTATION_WARNING

    config = _run_or_exit("adaptkit-train", lambda: from_composed(cfg))
    default_folder = config.run_dir is None
    config.run_dir = config.run_dir or HydraConfig.get().runtime.output_dir
    owed = None if config.overwrite else _finished_run_owes(config.run_dir)
    if default_folder and owed == []:
        # the default folder is named by the config hash: a finished run there is this very run; reuse it
        from .saved import load_run

        run = _run_or_exit("adaptkit-train", lambda: load_run(config.run_dir))
        how = "already finished: reused, nothing trained"
    else:
        run = _run_or_exit("adaptkit-train", lambda: train(config))
        how = f"{run.summary['steps']} steps in {run.summary['wall_seconds']:.1f}s"
        if owed:  # a finished run whose post-training phase was stopped: completed, nothing trained
            how = f"training had finished: completed {', '.join(s.replace('_', '-') for s in owed)}, nothing trained"
    s = run.summary
    if _rank() > 0:  # rank 0 reports the run (torchrun)
        return objective_value(run, config.objective) if config.objective is not None else None
    tgt = "unknown (no target labels)" if s["target_accuracy"] is None else f"{s['target_accuracy']:.4f}"
    print(f"{s['method']} on {s['data']} seed {s['seed']}: source-val accuracy {s['source_val_accuracy']:.4f}, "
          f"target accuracy {tgt}, {how} -> {config.run_dir}")
    global _WARNED
    if not _WARNED:  # once per process: a -m sweep prints it once, not after every run
        print(ADAPTATION_WARNING)
        _WARNED = True
    if config.objective is not None:
        return objective_value(run, config.objective)
    return None


def finished_run(folder) -> bool:
    """Whether ``folder`` holds a finished run with nothing left to do: its ``summary.json`` says finished and its
    post-training steps (label-shift estimate, diagnostics, plots) are all done."""
    return _finished_run_owes(folder) == []


def _finished_run_owes(folder):
    """The post-training steps the finished run in ``folder`` still owes (``[]``: none); ``None`` when ``folder``
    holds no finished run, or a summary that cannot be read (training then says why)."""
    from .run import read_summary, unfinished_steps

    try:
        summary = read_summary(folder)
    except ValueError:
        return None
    if summary is None or summary.get("status") != "finished":
        return None
    return unfinished_steps(folder, summary)


def objective_value(run, name: str) -> float:
    """The label-free score ``name`` of the kept state of ``run`` (the selected evaluation, else the last),
    oriented so that greater is better (negated for scores where lower is better): what ``adaptkit-train`` returns
    to a hydra sweeper with ``objective=<score>``. A hint for a search, not a target accuracy.

    >>> class R: history = [{"step": 5, "score/dev": 0.4}, {"step": 10, "score/dev": 0.3}]; summary = {}
    >>> objective_value(R(), "dev")  # DEV is a risk (lower is better), so it is negated
    -0.3
    """
    from .select import SCORES

    step = run.summary.get("selected_step")
    rows = [r for r in run.history if r.get(f"score/{name}") is not None]
    rows = [r for r in rows if r.get("step") == step] or rows
    if not rows:
        raise ValueError(f"objective={name!r}: the run recorded no value of that score (it needs inputs the run "
                         "lacks, or no evaluation ran).")
    value = float(rows[-1][f"score/{name}"])
    return value if SCORES[name].higher_is_better else -value


_hydra_train = hydra.main(config_path="configs", config_name="train", version_base="1.3")(_train)

_INFO_FLAGS = ("-h", "--help", "--hydra-help", "-c", "--cfg", "-i", "--info", "-sc", "--shell-completion",
               "--version", "-p", "--package", "-cp", "--config-path", "-cn", "--config-name", "-cd", "--config-dir")


def _compositions(overrides):
    """Override lists to check before anything runs: every override at its first value, and each other value of a
    sweep (``a,b`` or ``range(...)``) once with the rest at their first values — every value of every override is
    composed once, without the full product of a large sweep. Interval sweeps (for sweepers) are left to them."""
    from hydra.core.override_parser.overrides_parser import OverridesParser

    options = []
    for o in OverridesParser.create().parse_overrides(overrides):
        if o.key_or_group.startswith("hydra"):  # hydra's own settings (launcher, output dirs): hydra checks them
            continue
        if not o.is_sweep_override():
            options.append([o.input_line])
            continue
        try:
            options.append([f"{o.get_key_element()}={v}" for v in o.sweep_string_iterator()])
        except Exception:  # noqa: BLE001 — an interval or tag sweep: its values are the sweeper's to choose
            continue
    first = [opts[0] for opts in options]
    yield first
    for i, opts in enumerate(options):
        for other in opts[1:]:
            yield first[:i] + [other] + first[i + 1:]


def _composition_error(e: Exception, overrides) -> str:
    """Hydra's composition error in adaptkit's wording: what is unknown or wrong, and what is accepted."""
    import re

    from .config import GROUPS, SETTINGS, component_schema

    text = str(e)
    m = re.search(r"Could not override '([\w.]+)'", text)
    if m:
        key = m.group(1)
        group, _, option = key.partition(".")
        if group in GROUPS and option and "." not in option:
            from .config import compose

            try:  # which component the override was meant for: the config without it says
                name = compose([o for o in overrides if not o.lstrip("+~").startswith(key)])[group].name
                accepted = [n for n in component_schema(group, name).__dataclass_fields__ if n != "name"]
                return (f"Unknown option {option!r} for {group} {name!r} (override {key!r}). Accepted options: "
                        f"{', '.join(accepted) or '(none)'}.")
            except Exception:  # noqa: BLE001 — fall back to hydra's words
                return f"Unknown option {option!r} for the {group} (override {key!r})."
        if "." not in key:
            return f"Unknown setting {key!r}. Accepted settings: {', '.join(SETTINGS)}."
    cause = e.__cause__ or e.__context__
    first = text.splitlines()[0] if text else type(e).__name__
    detail = str(cause).splitlines()[0] if cause is not None and str(cause) else ""
    if "Could not find" in text:  # an unknown group option: hydra lists the available ones
        lines = [ln.strip() for ln in text.splitlines() if ln.strip() and not ln.startswith(("Config search", "\tprovider"))]
        return " ".join(ln for ln in lines if not ln.startswith("provider="))
    return f"{first}: {detail}" if detail and detail not in first else first


def preflight(prog: str, overrides, check) -> None:
    """Compose and check every run a command line describes before hydra starts (and creates any folder): a typo,
    a wrong type or a bad value fails at once, in one line, with exit status 2 — also for the tenth run of a sweep."""
    from hydra.errors import HydraException
    from omegaconf.errors import OmegaConfBaseException

    from .config import compose

    for overs in _compositions(overrides):
        try:
            check(compose(overs))
        except (HydraException, OmegaConfBaseException) as e:
            print(f"{prog}: error: {_composition_error(e, overs)}", file=sys.stderr)
            sys.exit(EXIT_BAD_INPUT)
        except (ValueError, TypeError, ImportError) as e:
            print(f"{prog}: error: {e}", file=sys.stderr)
            sys.exit(EXIT_BAD_INPUT)


def _check_train(cfg) -> None:
    from .config import check, from_composed

    check(from_composed(cfg))


def hydra_output_overrides(args) -> list:
    """Overrides that keep hydra's own files out of the way when a single run names its ``run_dir``: hydra would
    otherwise create ``runs/<data>/<method>/seed<k>/`` with ``.hydra/*.yaml`` and a log in the current directory,
    beside a run that lives elsewhere. With ``run_dir`` given, hydra writes nothing (no ``.hydra``, no log file,
    its run directory the current one); every setting hydra would record is in the run folder's ``config.yaml``.
    What the user sets for hydra themselves is kept; sweeps (``-m``) are left as they are.

    >>> hydra_output_overrides(["steps=5", "run_dir=/tmp/r"])
    ['hydra.run.dir=.', 'hydra.output_subdir=null', 'hydra/job_logging=none']
    >>> hydra_output_overrides(["run_dir=/tmp/r", "hydra.run.dir=/tmp/h"])
    ['hydra.output_subdir=null', 'hydra/job_logging=none']
    >>> hydra_output_overrides(["steps=5"]), hydra_output_overrides(["-m", "run_dir=/tmp/r"])
    ([], [])
    """
    if any(a in ("-m", "--multirun") for a in args):
        return []
    given = {}
    for a in args:
        if "=" in a and not a.startswith("-"):
            key, _, value = a.partition("=")
            given[key.lstrip("+~")] = value
    if given.get("run_dir") in (None, "", "null", "None"):
        return []
    wanted = [("hydra.run.dir", "."), ("hydra.output_subdir", "null"), ("hydra/job_logging", "none")]
    return [f"{k}={v}" for k, v in wanted if k not in given]


def import_from_overrides(prog: str, overrides) -> list:
    """Import the modules an ``imports=[...]`` override names and add what they register to hydra's config store,
    before hydra composes: ``adaptkit-train imports=[mypkg.shifts] data=my_shift`` then finds ``data=my_shift``
    (a group choice exists only once its component is registered). A module that cannot be imported is one line on
    stderr and exit status 2. Returns the module names."""
    from hydra.core.override_parser.overrides_parser import OverridesParser

    from .config import import_modules

    wanted = [a for a in overrides if not a.startswith("-") and a.split("=")[0].lstrip("+~") == "imports"]
    names = []
    try:
        for o in OverridesParser.create().parse_overrides(wanted):
            value = o.value()
            values = value if isinstance(value, list) else list(getattr(value, "list", [value]))
            for v in values:
                names += list(v) if isinstance(v, list) else [v]
        import_modules(names, owner="the command line")
    except (ValueError, TypeError, ImportError) as e:
        print(f"{prog}: error: {e}", file=sys.stderr)
        sys.exit(EXIT_BAD_INPUT)
    except Exception:  # noqa: BLE001 — a malformed override: hydra's own composition reports it
        return []
    register_configs()
    return names


def train_main() -> None:
    """``adaptkit-train``: import the modules ``imports=[...]`` names, check the command line's runs (all values of
    a sweep), then hand over to hydra (which, with ``run_dir`` given, then writes nothing of its own:
    :func:`hydra_output_overrides`)."""
    args = sys.argv[1:]
    import_from_overrides("adaptkit-train", args)
    if not any(a in _INFO_FLAGS or a.split("=")[0] in _INFO_FLAGS for a in args):
        preflight("adaptkit-train", [a for a in args if not a.startswith("-")], _check_train)
        extra = hydra_output_overrides(args)
        if _rank() > 0:  # under torchrun only rank 0 writes: hydra's own files included
            extra += [o for o in ("hydra.output_subdir=null", "hydra/job_logging=none") if o not in extra]
        sys.argv = sys.argv[:1] + args + extra
    _hydra_train()


def _bench(cfg: DictConfig) -> None:
    from .bench.app import GRID_COMMAND, grid_command

    _run_or_exit(GRID_COMMAND, lambda: grid_command(cfg))


def _study(cfg: DictConfig) -> None:
    from .bench.app import STUDY_COMMAND, study_command

    _run_or_exit(STUDY_COMMAND, lambda: study_command(cfg))


def _with_bench_schema(app):
    """``app`` after the bench schema is in hydra's config store (the core's config module does not know it)."""
    def main():
        from .bench.config import register_schema

        register_schema()
        return app()

    return main


bench_main = _with_bench_schema(hydra.main(config_path="configs", config_name="bench", version_base="1.3")(_bench))
study_main = _with_bench_schema(hydra.main(config_path="configs", config_name="study", version_base="1.3")(_study))


def _cell(cfg: DictConfig) -> None:
    from .bench.launch import cell_job

    r = _run_or_exit("adaptkit-cell", lambda: cell_job(cfg))
    acc = "" if r["target_accuracy"] is None else f", target accuracy {r['target_accuracy']:.4f}"
    print(f"{r['dir']}: {r['status']}{acc} ({r['seconds']:.1f}s)" + (f" — {r['error']}" if r["error"] else ""))
    if r["status"] == "interrupted":  # resumable: resubmit the sweep
        sys.exit(EXIT_INTERRUPTED)
    if r["status"] != "ok":  # recorded in the cell's failure.json; the launcher sees this job fail alone
        sys.exit(1)


def cell_main() -> None:
    """``adaptkit-cell grid=DIR cell=I`` (usually ``-m`` through a hydra launcher): train cell I of the grid that
    ``adaptkit-bench ... launch=export out_dir=DIR`` exported (:mod:`adaptkit.bench.launch`)."""
    from .bench.launch import CELL_SCHEMA, register_cell_schema

    register_cell_schema()
    hydra.main(config_path="configs", config_name=CELL_SCHEMA, version_base="1.3")(_cell)()


def runs_main(argv=None) -> None:
    """``adaptkit-runs PARENT [--out DIR]``: one table of the run folders under PARENT (a sweep's folder, ``runs/``):
    writes ``runs.csv`` and ``runs.md`` and prints the table (:func:`adaptkit.bench.runs.summarise_runs`)."""
    import argparse

    from .bench.runs import markdown, summarise_runs

    parser = argparse.ArgumentParser(prog="adaptkit-runs", description=(
        "Summarise the run folders under PARENT into one table (runs.csv, runs.md): the settings that differ, the "
        "target accuracy where the target was labelled for scoring, the label-free scores, the status."))
    parser.add_argument("parent", help="the parent folder of the run folders (e.g. runs/)")
    parser.add_argument("--out", default=None, help="where runs.csv and runs.md go (default: PARENT)")
    args = parser.parse_args(argv)
    try:
        result = summarise_runs(args.parent, args.out)
    except FileNotFoundError as e:
        print(str(e), file=sys.stderr)
        sys.exit(EXIT_BAD_INPUT)
    print(markdown(result.columns, result.rows, text=True))
    print(f"{len(result.rows)} run folder(s) -> {result.csv_path}, {result.md_path}")
