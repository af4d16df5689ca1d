"""Loop overhead: time per training step in adaptkit's loop against a hand-written plain-PyTorch loop doing the same
computation with the same model, batch size and optimiser, interleaved in one process (median of repeats).

The plain loop draws batches with torch.randint indexing, builds one SGD optimiser per update and calls each
update's loss function directly: it is what a researcher would write by hand around the same losses. For DANN
the plain side is written out completely by hand (reversal layer, discriminator, BCE) as a check that the method's
own loss adds nothing either. Evaluation is switched off on both sides (it is not part of a training step).

Target: ratio ≤ 1.05 for every method.  Run: ``python benchmarks/loop_overhead.py``
"""
from __future__ import annotations

import sys

import torch
import torch.nn.functional as F

from adaptkit.data.batches import PairedBatches
from adaptkit.data.shifts import make_shift
from adaptkit.losses import grad_reverse
from adaptkit.methods import METHODS, Progress, SetupInfo, build_method
from adaptkit.nets import AdaptedModel, MLPEncoder, MLPHead
from adaptkit.train.loop import Trainer, stage_bounds
from adaptkit.train.optim import OptimSettings, make_optimizer

from _common import interleaved, machine, median, table

STEPS, BATCH, REPEATS = 200, 64, 7


def mean_gap(fs, ft):
    return (fs.mean(0) - ft.mean(0)).pow(2).sum()


def build(name, pair, seed=0):
    torch.manual_seed(seed)
    opts = {"loss_fn": mean_gap} if name == "feature_loss" else {}
    method = build_method(name, **opts)
    if len(pair.input_shape) == 3:  # images: the small CNN
        from adaptkit.nets import SmallCNN

        enc = SmallCNN(pair.input_shape, features=32)
    else:
        enc = MLPEncoder(pair.input_shape, hidden=[64], features=32)
    model = AdaptedModel(enc, MLPHead(32, pair.n_classes, hidden=[64], dropout=0.5), 32, pair.n_classes)
    method.attach(model, SetupInfo(32, pair.n_classes, pair.input_shape, BATCH, STEPS))
    return model, method


def adaptkit_steps(name, pair, check_gradients=True):
    model, method = build(name, pair)
    data = pair.oracle_training_data() if method.uses_target_labels else pair.training_data()
    tr = Trainer(model, method, PairedBatches(data, BATCH, 0), steps=STEPS, optim=OptimSettings(lr=0.01),
                 evaluate=lambda m: {}, eval_every=10**9, progress=False, handle_signals=False,
                 check_gradients=check_gradients)
    def go():
        import time
        tr.step, tr.stage_index, tr.history = 0, -1, []  # rerun all stages from the first
        t = time.perf_counter()
        tr.run()
        return (time.perf_counter() - t) / STEPS
    return go


def plain_steps(name, pair):
    model, method = build(name, pair)
    data = pair.oracle_training_data() if method.uses_target_labels else pair.training_data()
    xs, ys, xt = data.source_x, data.source_y, data.target_x
    g = torch.Generator().manual_seed(0)
    stages = method.stages()
    bounds = stage_bounds(stages, STEPS)
    s = OptimSettings(lr=0.01)

    def go():
        import time
        t0 = time.perf_counter()
        for stage, (a, b) in zip(stages, bounds):
            method.on_stage_start(stage)
            opts = [make_optimizer(u.parameters(), s.with_overrides(u.optimizer, u.name)) for u in stage.updates]
            for step in range(a, b):
                i = torch.randint(len(xs), (BATCH,), generator=g)
                j = torch.randint(len(xt), (BATCH,), generator=g)
                from adaptkit.data.batches import Batch
                batch = Batch(xs[i], ys[i], xt[j])
                t = Progress(step, stage.name, step - a, (step - a) / (b - a))
                for u, opt in zip(stage.updates, opts):
                    for _ in range(u.repeat):
                        opt.zero_grad(set_to_none=True)
                        loss, _ = u.loss(batch, t)  # every bundled update returns (loss, logs)
                        loss.backward()
                        opt.step()
        return (time.perf_counter() - t0) / STEPS
    return go


def plain_dann_by_hand(pair):
    """DANN written out by hand: nothing from adaptkit's method code on the hot path."""
    model, method = build("dann", pair)
    enc, head, disc = model.encoder, model.head, method.discriminator
    xs, ys, xt = pair.source_train.x, pair.source_train.y, pair.target_train_x
    g = torch.Generator().manual_seed(0)
    opt = torch.optim.SGD(list(enc.parameters()) + list(head.parameters()) + list(disc.parameters()), lr=0.01,
                          momentum=0.9)
    import math

    def go():
        import time
        t0 = time.perf_counter()
        for step in range(STEPS):
            i = torch.randint(len(xs), (BATCH,), generator=g)
            j = torch.randint(len(xt), (BATCH,), generator=g)
            p = step / STEPS
            lam = 2 / (1 + math.exp(-10 * p)) - 1
            opt.zero_grad(set_to_none=True)
            fs, ft = enc(xs[i]), enc(xt[j])
            ce = F.cross_entropy(head(fs), ys[i])
            ds, dt = disc(grad_reverse(fs, lam)), disc(grad_reverse(ft, lam))
            dom = 0.5 * (F.binary_cross_entropy_with_logits(ds, torch.ones_like(ds))
                         + F.binary_cross_entropy_with_logits(dt, torch.zeros_like(dt)))
            (ce + dom).backward()
            opt.step()
        return (time.perf_counter() - t0) / STEPS
    return go


PROBLEMS = {"rotated_moons": "mlp encoder 64→32", "corrupted_digits": "small_cnn encoder 16/32 channels→32"}


def main() -> str:
    torch.set_num_threads(1)
    global STEPS
    outs = []
    for problem, arch in PROBLEMS.items():
        STEPS = 200 if problem == "rotated_moons" else 60
        outs.append(one_problem(problem, arch))
    out = "\n\n".join(outs)
    print(out)
    return out


def one_problem(problem: str, arch: str) -> str:
    pair = make_shift(problem, seed=0)
    rows = []
    names = [n for n in METHODS.names()]
    for name in names:
        fns = {"adaptkit": adaptkit_steps(name, pair), "plain": plain_steps(name, pair),
               "losses_only": adaptkit_steps(name, pair, check_gradients=False)}
        if name == "dann":
            fns["by_hand"] = plain_dann_by_hand(pair)
        for f in fns.values():
            f()  # warm-up
        res = interleaved(fns, REPEATS)
        a, p = median(res["adaptkit"]), median(res["plain"])
        extra = f"; by hand {median(res['by_hand']) * 1e3:.3f} ms (ratio {a / median(res['by_hand']):.3f})" \
            if "by_hand" in res else ""
        lo = median(res["losses_only"])
        rows.append([name, f"{a * 1e3:.3f}", f"{lo * 1e3:.3f}", f"{p * 1e3:.3f}", f"{a / p:.3f}", f"{lo / p:.3f}",
                     extra.lstrip("; ")])
        print(f"{name}: adaptkit {a*1e3:.3f} ms/step (losses-only checks {lo*1e3:.3f}), plain {p*1e3:.3f} ms/step, "
              f"ratio {a/p:.3f} / {lo/p:.3f}{extra}", file=sys.stderr, flush=True)
    return (f"Loop overhead on {problem} ({machine()}; {arch}, mlp head with dropout, batch {BATCH} per "
           f"domain, SGD; {STEPS} steps × {REPEATS} interleaved repeats, median)\n\n"
           + table(["method", "adaptkit ms/step (default)", "adaptkit, check_gradients=false", "plain ms/step",
                     "ratio (default)", "ratio (check_gradients=false)", "note"], rows))


if __name__ == "__main__":
    main()
