"""Command-line entry points (hydra apps): ``adaptkit-train``, ``adaptkit-bench`` and ``adaptkit-study``."""
from __future__ import annotations

import sys

import hydra
from omegaconf import DictConfig

from .config import register_configs

register_configs()

EXIT_BAD_INPUT = 2
EXIT_INTERRUPTED = 75  # EX_TEMPFAIL: try again later — the run is resumable


def _run_or_exit(prog: str, fn):
    """Run ``fn()``; turn the library's errors into one line on stderr and the exit status a scheduler can read."""
    from .train.loop import DivergenceError, Interrupted

    try:
        return fn()
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


def _train(cfg: DictConfig) -> None:
    from hydra.core.hydra_config import HydraConfig

    from .config import fit_from_config
    from .run import ADAPTATION_WARNING
    run_dir = cfg.run_dir or HydraConfig.get().runtime.output_dir
    run = _run_or_exit("adaptkit-train", lambda: fit_from_config(cfg, run_dir=run_dir))
    s = run.summary
    tgt = "unknown (no target labels)" if s["target_accuracy"] is None else f"{s['target_accuracy']:.4f}"
    print(f"{s['method']} on {s['data']} seed {s['seed']}: source-val accuracy {s['source_val_accuracy']:.4f}, "
          f"target accuracy {tgt}, {s['steps']} steps in {s['wall_seconds']:.1f}s -> {run_dir}")
    print(ADAPTATION_WARNING)


train_main = hydra.main(config_path="configs", config_name="train", version_base="1.3")(_train)


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
