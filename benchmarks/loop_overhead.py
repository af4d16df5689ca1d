"""Loop overhead: time per training step in adaptkit's loop against a hand-written plain-PyTorch loop doing the same
computation with the same model, batch size and optimiser, interleaved in one process (median of repeats).

The plain loop draws batches as adaptkit does — shuffled passes over each domain, by tensor indexing — builds one
SGD optimiser per update and calls each update's loss function directly: it is what a researcher would write by
hand around the same losses, doing the same work but checking nothing and logging nothing (the strictest
baseline). A second plain loop samples with replacement (``torch.randint``, no passes; a little cheaper), shown for
comparison with earlier tables. For DANN the plain side is also written out completely by hand (reversal layer,
discriminator, BCE) as a check that the method's own loss adds nothing either. Evaluation is switched off on both
sides (it is not part of a training step).

Each variant is timed by the process's CPU time (``time.process_time``; one torch thread, no I/O, so CPU time is
the work done) and by wall-clock time; on a shared machine other processes inflate wall-clock times at random,
CPU time much less. Ratios of medians are reported for both.

Also: the cost of the checkpoint digests (computing them when saving, verifying them when loading) against
``torch.save``/``torch.load`` of the same digits-CNN checkpoint.

Target: ratio ≤ 1.05 for every method, with the default checks.  Run: ``python benchmarks/loop_overhead.py``
(``--repeats N``; ``--problems rotated_moons`` for one problem; ``--methods dann,coral`` for some methods).
"""
from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import torch
import torch.nn.functional as F

from adaptkit.data.batches import Batch, PairedBatches
from adaptkit.data.shifts import make_shift
from adaptkit.losses import grad_reverse
from adaptkit.methods import METHODS, Progress, SetupInfo, build_method
from adaptkit.nets import AdaptedModel, MLPEncoder, MLPHead
from adaptkit.train.loop import (Trainer, _tensors, checkpoint_digests, load_checkpoint, stage_bounds,
                                 verify_digests)
from adaptkit.train.optim import OptimSettings, make_optimizer

from _common import interleaved, machine, median, table

STEPS, BATCH, REPEATS = 200, 64, 15


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
        tr.step, tr.stage_index, tr.history = 0, -1, []  # rerun all stages from the first
        c, w = time.process_time(), time.perf_counter()
        tr.run()
        return (time.process_time() - c) / STEPS, (time.perf_counter() - w) / STEPS
    return go


def shuffled_passes(n, size, g):
    """Hand-written batching: indices in shuffled passes over ``n`` items, ``size`` at a time, a batch that runs past
    the end of a pass continuing into the next one — what adaptkit's PairedBatches draws, written as one would by
    hand."""
    left = torch.randperm(n, generator=g)
    while True:
        while len(left) < size:
            left = torch.cat([left, torch.randperm(n, generator=g)])
        yield left[:size]
        left = left[size:]


def plain_steps(name, pair, sampler="passes"):
    """The same stages, updates, losses and optimisers in a plain loop. ``sampler="passes"`` draws batches as
    adaptkit does (shuffled passes: the same work); ``"randint"`` samples with replacement (cheaper: no passes)."""
    model, method = build(name, pair)
    data = pair.oracle_training_data() if method.uses_target_labels else pair.training_data()
    xs, ys, xt = data.source_x, data.source_y, data.target_x
    g = torch.Generator().manual_seed(0)
    src, tgt = shuffled_passes(len(xs), BATCH, g), shuffled_passes(len(xt), BATCH, g)
    stages = method.stages()
    bounds = stage_bounds(stages, STEPS)
    s = OptimSettings(lr=0.01)

    def go():
        c, w = time.process_time(), time.perf_counter()
        for stage, (a, b) in zip(stages, bounds):
            method.on_stage_start(stage)
            opts = [make_optimizer(u.parameters(), s.with_overrides(u.optimizer, u.name)) for u in stage.updates]
            for step in range(a, b):
                if sampler == "passes":
                    i, j = next(src), next(tgt)
                else:
                    i = torch.randint(len(xs), (BATCH,), generator=g)
                    j = torch.randint(len(xt), (BATCH,), generator=g)
                batch = Batch(xs[i], ys[i], xt[j])
                t = Progress(step, stage.name, step - a, (step - a) / (b - a))
                for u, opt in zip(stage.updates, opts):
                    for _ in range(u.repeat):
                        opt.zero_grad(set_to_none=True)
                        loss, _ = u.loss(batch, t)  # every bundled update returns (loss, logs)
                        loss.backward()
                        opt.step()
        return (time.process_time() - c) / STEPS, (time.perf_counter() - w) / STEPS
    return go


def plain_dann_by_hand(pair):
    """DANN written out by hand: nothing from adaptkit's method code on the hot path."""
    model, method = build("dann", pair)
    enc, head, disc = model.encoder, model.head, method.discriminator
    xs, ys, xt = pair.source_train.x, pair.source_train.y, pair.target_train_x
    g = torch.Generator().manual_seed(0)
    src, tgt = shuffled_passes(len(xs), BATCH, g), shuffled_passes(len(xt), BATCH, g)
    opt = torch.optim.SGD(list(enc.parameters()) + list(head.parameters()) + list(disc.parameters()), lr=0.01,
                          momentum=0.9)
    import math

    def go():
        c, w = time.process_time(), time.perf_counter()
        for step in range(STEPS):
            i, j = next(src), next(tgt)
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
        return (time.process_time() - c) / STEPS, (time.perf_counter() - w) / STEPS
    return go


PROBLEMS = {"rotated_moons": "mlp encoder 64→32", "corrupted_digits": "small_cnn encoder 16/32 channels→32"}


def main(argv=None) -> str:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeats", type=int, default=REPEATS)
    ap.add_argument("--problems", default=",".join(PROBLEMS))
    ap.add_argument("--methods", default="")
    ap.add_argument("--no-digests", action="store_true", help="skip the checkpoint digest timing")
    args = ap.parse_args(argv if argv is not None else [])
    torch.set_num_threads(1)
    global STEPS
    outs = []
    for problem in args.problems.split(","):
        STEPS = 200 if problem == "rotated_moons" else 60
        outs.append(one_problem(problem, PROBLEMS[problem], args.repeats,
                                [m for m in args.methods.split(",") if m] or METHODS.names()))
    if not args.no_digests:
        outs.append(digest_cost())
    out = "\n\n".join(outs)
    print(out)
    return out


def alternating(fns, repeats):
    """Like ``_common.interleaved``, but every other round runs the variants in reverse order, so that no variant
    always follows the same one."""
    out = {k: [] for k in fns}
    keys = list(fns)
    for r in range(repeats):
        for k in keys if r % 2 == 0 else keys[::-1]:
            out[k].append(fns[k]())
    return out


def one_problem(problem: str, arch: str, repeats: int, names) -> str:
    pair = make_shift(problem, seed=0)
    rows = []
    for name in names:
        fns = {"adaptkit": adaptkit_steps(name, pair), "plain": plain_steps(name, pair),
               "losses_only": adaptkit_steps(name, pair, check_gradients=False),
               "randint": plain_steps(name, pair, sampler="randint")}
        if name == "dann":
            fns["by_hand"] = plain_dann_by_hand(pair)
        for f in fns.values():
            f()  # warm-up
        res = alternating(fns, repeats)
        cpu = {k: median([r[0] for r in v]) for k, v in res.items()}
        wall = {k: median([r[1] for r in v]) for k, v in res.items()}
        a, p, lo = cpu["adaptkit"], cpu["plain"], cpu["losses_only"]
        extra = f"by hand {cpu['by_hand'] * 1e3:.3f} ms (ratio {a / cpu['by_hand']:.3f})" if "by_hand" in cpu else ""
        rows.append([name, f"{a * 1e3:.3f}", f"{lo * 1e3:.3f}", f"{p * 1e3:.3f}", f"**{a / p:.3f}**", f"{lo / p:.3f}",
                     f"{wall['adaptkit'] / wall['plain']:.3f}", f"{a / cpu['randint']:.3f}", extra])
        print(f"{name}: cpu adaptkit {a*1e3:.3f} ms/step (losses-only {lo*1e3:.3f}), plain {p*1e3:.3f}; ratio "
              f"{a/p:.3f} / {lo/p:.3f}; wall {wall['adaptkit'] / wall['plain']:.3f}; vs randint plain "
              f"{a / cpu['randint']:.3f} {extra}", file=sys.stderr, flush=True)
    return (f"Loop overhead on {problem} ({machine()}; {arch}, mlp head with dropout, batch {BATCH} per "
            f"domain, SGD; {STEPS} steps × {repeats} interleaved repeats (order reversed every other round), "
            "median; CPU time unless marked wall)\n\n"
            + table(["method", "adaptkit ms/step (default checks)", "adaptkit, check_gradients=false",
                     "plain ms/step", "ratio (default)", "ratio (check_gradients=false)", "ratio (default), wall",
                     "ratio (default) vs plain sampling with replacement", "note"], rows))


def digest_cost(repeats: int = 21) -> str:
    """Milliseconds to compute and to verify the digests of a digits-CNN checkpoint, beside torch.save/torch.load
    of the same checkpoint to a file (median of ``repeats``, interleaved)."""
    global STEPS
    STEPS = 20
    pair = make_shift("corrupted_digits", seed=0)
    model, method = build("dann", pair)
    tr = Trainer(model, method, PairedBatches(pair.training_data(), BATCH, 0), steps=STEPS,
                 optim=OptimSettings(lr=0.01), evaluate=lambda m: {"source_val_accuracy": 0.5}, eval_every=5,
                 progress=False, handle_signals=False, select=("source_val_accuracy", True))
    tr.run()  # optimiser moments, history and a best state: a checkpoint as a run writes it
    state = tr.state_dict()
    n_tensors = len(state["digests"]["tensors"])
    mib = sum(t.numel() * t.element_size() for _, t in _tensors(state)) / 2 ** 20
    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "checkpoint.pt"
        torch.save(state, path)

        def t(fn):
            c = time.perf_counter()
            fn()
            return time.perf_counter() - c

        fns = {"save": lambda: t(lambda: torch.save(state, path)),
               "digests": lambda: t(lambda: checkpoint_digests(state)),
               "load": lambda: t(lambda: load_checkpoint(path)),
               "verify": lambda: t(lambda: verify_digests(state, "bench"))}
        res = interleaved(fns, repeats)
    ms = {k: median(v) * 1e3 for k, v in res.items()}
    rows = [["save (state_dict digests + torch.save)", f"{ms['digests']:.2f}", f"{ms['save']:.2f}",
             f"{ms['digests'] / ms['save']:.0%}"],
            ["load (torch.load + verify)", f"{ms['verify']:.2f}", f"{ms['load']:.2f}",
             f"{ms['verify'] / ms['load']:.0%}"]]
    return (f"Checkpoint digests, corrupted_digits small_cnn + DANN discriminator ({n_tensors} tensors, {mib:.2f} MiB "
            f"incl. SGD momentum and a best state; {machine()}; median of {repeats}, wall clock, ms)\n\n"
            + table(["operation", "digests ms", "torch.save / torch.load ms", "digests / torch"], rows))


if __name__ == "__main__":
    main(sys.argv[1:])
