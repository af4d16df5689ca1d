"""``make demo`` (``python -m adaptkit.demo``): the default benchmark grid, a compact table, and where the report is.

The default grid (``configs/bench/demo.yaml``) trains the six published methods (DANN, domain confusion, ADDA, ADR,
Deep CORAL, MMD) beside the source-only baseline and the target-oracle upper bound on the four bundled shifts, with
three seeds, every method on a shift sharing the same recipe. About 3 minutes on 2 CPU cores; a rerun reuses the
finished cells. Hydra-style overrides are accepted, e.g. ``python -m adaptkit.demo workers=4 seeds=[0]`` or
``python -m adaptkit.demo bench=tiny``.

The shifts are toys: the numbers show how to compare methods, not which method to use on real data.
"""
from __future__ import annotations

import sys
from typing import List, Optional


def main(argv: Optional[List[str]] = None) -> int:
    from hydra.errors import HydraException

    from .bench.app import grid_command
    from .bench.config import compose_bench
    from .train.loop import Interrupted

    overrides = list(sys.argv[1:] if argv is None else argv)
    try:
        grid_command(compose_bench(overrides))
    except (ValueError, TypeError, HydraException) as e:  # a bad override names itself and what is accepted
        print(f"adaptkit.demo: error: {e}", file=sys.stderr)
        return 2
    except (Interrupted, KeyboardInterrupt) as e:
        print(f"adaptkit.demo: {e or 'interrupted'}; rerun to resume the grid.", file=sys.stderr)
        return 75  # EX_TEMPFAIL, as adaptkit-train: try again later, the grid is resumable
    return 0


if __name__ == "__main__":
    sys.exit(main())
