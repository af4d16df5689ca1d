"""Settings and methods shared by the bench tests: tiny grids (2 methods × 1–2 small shifts × 1–2 seeds, 20 steps)
and two methods importable by path that fail on purpose."""
from adaptkit.methods import Alignment, Stage, Update
from adaptkit.select import SCORES

NET = {"encoder": {"name": "mlp", "hidden": [16], "features": 8}, "head": {"name": "mlp", "hidden": [16]},
       "optim": {"name": "adam", "lr": 0.01}, "steps": 20, "batch_size": 16, "eval_every": 10}
STUDY_NET = {**NET, "eval_every": 20}  # a study reads its scores at the final evaluation only
MOONS = {"name": "rotated_moons", "params": {"n_source": 60, "n_target": 60}}
BLOBS = {"name": "shifted_blobs", "params": {"n_source": 60, "n_target": 60, "n_features": 3}}


def tiny(out_dir, **kw):
    """Bench overrides for a 2 methods × 2 shifts × 2 seeds grid of 20-step cells."""
    settings = dict(methods=["source_only", "coral"], shifts=[MOONS, BLOBS], seeds=[0, 1],
                    recipes={"rotated_moons": NET, "shifted_blobs": NET}, out_dir=str(out_dir), workers=1,
                    verbose=False)
    settings.update(kw)
    return settings


def study_settings(out_dir, **kw):
    """Bench overrides for a study: 2 methods × 1 shift × 2 seeds × 2 swept weights."""
    s = dict(methods=["coral", "dann"], shifts=[MOONS], seeds=[0, 1], recipes={"rotated_moons": STUDY_NET},
             sweep={"weight": [0.3, 3.0]}, scores=list(SCORES), out_dir=str(out_dir), workers=2, verbose=False)
    s.update(kw)
    return s


def numbers(rows):
    """Result rows without the one column that legitimately differs between runs: wall seconds."""
    return [{k: v for k, v in r.items() if k != "wall_seconds"} for r in rows]


class FailsOnTwoInputs(Alignment):
    """Source-only training that refuses 2-D inputs in setup: fails on the moons, trains on 3-D blobs."""

    name = "fails_on_two_inputs"

    def setup(self, model, info):
        if info.input_shape == (2,):
            raise ValueError("FailsOnTwoInputs refuses 2-D inputs")

    def stages(self):
        return [Stage("train", [Update("classify", [self.model.encoder, self.model.head], self.source_loss)])]


def nan_loss(source_features, target_features):
    """A user's loss that returns NaN: the loop raises DivergenceError."""
    return (source_features.mean() - target_features.mean()) * float("nan")
