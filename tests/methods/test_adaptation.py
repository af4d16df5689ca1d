"""Adaptation actually happens: each method against source-only on the bundled toys, with one fixed recipe per toy.

- Rotated two moons at 30° (the toy of Ganin et al., JMLR 2016, §5.1.1), seeds 0–4: every method's mean target
  accuracy must be above source-only's.
- Corrupted digits (the shift's defaults: contrast lowered by 65%, pixel noise 0.1), seeds 0–4: at least four of
  the six methods must beat source-only on average.

"Above" means by at least ``MIN_GAIN`` = 0.01 (one point of accuracy, 15 of the 1500 scored moons points over five
seeds): a tie within a handful of test points is not evidence of adaptation.

Fairness: on a toy every method gets the same encoder, head, steps, batch size and optimiser; only the method's own
options differ, and only where the paper leaves them open (or where its value belongs to a different network). The
run seed also draws the toy data, so all methods of a seed see the same data and the comparison is paired.

Not fitted to its own seeds: recipes and options were chosen on tuning seeds 100–111 (moons) and 100–109 (digits),
never on the test seeds. Mean target accuracy measured on the tuning seeds, for the record:

    moons  (seeds 100–111): source_only .789, dann .856, confusion .856, adda .853, adr .882, coral .895, mmd .925
                            (target oracle .998)
    digits (seeds 100–109): source_only .754, dann .787, confusion .794, adda .810, adr .762, coral .812, mmd .789
                            (target oracle .832)
    moons  (seeds 100–104, the later baselines; the search is in the comments of ``OPTIONS``): source_only .805,
                            cdan .781, cdan_e .781, mcd .822, self_training .881

A method that does not beat source-only after such a search is to be declared a known failure
(``xfail(strict=True)``) with the measured numbers in its reason: on moons CDAN and CDAN+E (below source-only at
every setting searched) and MCD (ahead on the tuning seeds, not on the test seeds); see ``KNOWN_FAILURES``. On digits
ADR does not beat source-only (tuning seeds .762 vs .754 at best; seeds 0–4 .719 vs .751), which the "four of six"
rule allows. The later baselines are tested on moons only; source-only is trained once per toy and seed and shared
by every comparison (``accuracies`` is cached for the session).

Every run is seeded and runs on the CPU with one torch thread (``tests/conftest.py``; the bench's workers use one
too), so the numbers repeat exactly on a given platform; with more threads the digits CNN's float sums run in
another order and its numbers move by a few points. The runs are spread over two worker processes: 3 min 37 s
for the file under ``make test`` (2026-12-03, beside the other xdist worker); marked ``slow`` (``make test`` runs
it).
"""
from __future__ import annotations

import functools
import multiprocessing
import os
import statistics
from concurrent.futures import ProcessPoolExecutor
from typing import Dict, Tuple

import pytest
import torch
from omegaconf import OmegaConf

from adaptkit import fit
from adaptkit.bench.config import compose_bench

pytestmark = pytest.mark.slow

MIN_GAIN = 0.01  # a method "beats" source-only when its mean target accuracy is higher by at least this
METHODS = ("dann", "confusion", "adda", "adr", "coral", "mmd")
# The later baselines (CDAN, CDAN+E, MCD, self-training), tested on moons only. A label names its method where the
# two differ: cdan_e is CDAN with its entropy weighting.
LATER = ("cdan", "cdan_e", "mcd", "self_training")
METHOD_OF = {"cdan_e": "cdan"}
SEEDS = {"rotated_moons": (0, 1, 2, 3, 4), "corrupted_digits": (0, 1, 2, 3, 4)}

# One recipe per toy, shared by source-only and every method: the benchmark's (``configs/bench.yaml``, where its
# choices are explained), read from there so that ``adaptkit-bench`` trains exactly what is tested here. Only the
# data differ: moons with 1000 target points (300 scored, 700 unlabelled for training) instead of 300.
DATA_OPTIONS: Dict[str, dict] = {
    "rotated_moons": {"angle": 30.0, "n_target": 1000},
    "corrupted_digits": {},  # the shift's defaults: 65% contrast loss, pixel noise 0.1, no translation
}


@functools.lru_cache(maxsize=None)
def recipe(toy: str) -> dict:
    """The bench recipe of ``toy`` as keyword arguments of :func:`adaptkit.fit`."""
    r = OmegaConf.to_container(compose_bench().recipes[toy], resolve=True)
    encoder, head = dict(r["encoder"]), dict(r["head"])
    return dict(encoder=encoder.pop("name"), encoder_options=encoder, head=head.pop("name"), head_options=head,
                steps=r["steps"], batch_size=r["batch_size"], optim=r["optim"])


# Per-method options (chosen on the tuning seeds). Where a paper states a value for this setting it is kept.
OPTIONS: Dict[str, Dict[str, dict]] = {
    "rotated_moons": {
        # A logistic domain classifier on the features (no hidden layer), like the paper's shallow DANN; with
        # hidden layers DANN fell below source-only here (measured with a linear head). λ: the paper's 6 for this
        # toy collapsed on 1 of 12 tuning seeds (0.60); 3 never did (ours).
        "dann": {"weight": 3.0, "disc_hidden": []},
        "confusion": {"weight": 1.0, "weight_schedule": "constant"},  # the defaults these numbers were measured with
        "adda": {},
        "adr": {"weight": 0.3},  # ours, of 0.03–1: weight 0.5 and 1 collapse some seeds (0.82, 0.57 on average)
        # CORAL's distance is divided by 4d² (d = 16 here); the paper balances it against the CE (ours: 3e4).
        "coral": {"weight": 30000.0},
        "mmd": {"weight": 3.0, "weight_schedule": "dann_ramp"},  # ours; weight 1 fell below source-only (0.74)
        # The later baselines, searched on tuning seeds 100–104 (source-only .805 there; moons with 1000 target
        # points, as here). CDAN and CDAN+E: weight {0.1, 0.3, 1, 3, 10} × discriminator {logistic, [64, 64]}
        # (10 with [64, 64] only; 3 with [64, 64] also with the gradient through the predictions): every setting
        # below source-only, the best (these) .781 and .781; higher weights lower (.69–.78).
        "cdan": {"weight": 0.1, "disc_hidden": []},
        "cdan_e": {"entropy_weighting": True, "weight": 0.1, "disc_hidden": []},
        # MCD: the paper's n = 4 generator steps and weight 1 (.822) beat n = 1 (.793); weight 3 collapsed (.500).
        "mcd": {},
        # Self-training: threshold {0.7, 0.8, 0.9, 0.95} × weight {0.3, 1, 3} (0.95 with 3 only; 0.7 also with
        # 10): these .881; weight 0.3 or 1 stayed near source-only (.80–.82), 10 swung (.80 ± .14). The EMA teacher
        # (decay 0.99, weight 3) gave .813 at threshold 0.7 and .817 at 0.8: the current model's labels did better.
        "self_training": {"threshold": 0.7, "weight": 3.0, "class_balanced": False},
    },
    "corrupted_digits": {
        # Ours, all of them. At this learning rate the adversarial and MMD terms at weight 1 pull the target
        # predictions onto one class in some seeds (tuning seeds: dann 0.65 at weight 1, confusion 0.61 at 0.3).
        "dann": {"weight": 0.3},  # of 0.1, 0.2, 0.3, 0.5, 1
        "confusion": {"weight": 0.1, "weight_schedule": "constant", "disc_hidden": [64]},  # of weights 0.05–0.3, four discriminator widths
        # ADDA: a wider discriminator (nearer the paper's 500-500) and a longer source stage; [32] collapsed (0.49)
        "adda": {"disc_hidden": [128, 128], "pretrain_share": 0.7},
        "adr": {"weight": 0.003},  # of 0.001–0.01, 1/2/4 generator steps, symmetric KL or L1: best, +0.008
        "coral": {"weight": 10000.0},  # d = 64; 1e4 beat 3e4
        "mmd": {"weight": 0.03, "weight_schedule": "constant"},  # of 0.01–0.1
    },
}


def _target_accuracy(job: Tuple[str, str, int]) -> float:
    """One run of the comparison (top level, so that a worker process can run it)."""
    toy, method, seed = job
    torch.set_num_threads(1)  # as tests/conftest.py: the numbers repeat exactly whichever process trains
    run = fit(toy, method=METHOD_OF.get(method, method), seed=seed, data_options=DATA_OPTIONS[toy],
              eval_every=recipe(toy)["steps"], progress=False, device="cpu", **recipe(toy),
              **OPTIONS[toy].get(method, {}))
    return float(run.summary["target_accuracy"])


@functools.lru_cache(maxsize=None)
def all_accuracies(toy: str) -> Dict[str, Tuple[float, ...]]:
    """Target accuracy of source-only and every method on ``toy`` for each test seed, computed once per session.

    The runs are independent and each uses one torch thread, so they are spread over up to two worker processes
    (the machines that run the suite have two cores and the test process uses one): the same numbers as a serial
    loop, in half the time."""
    methods = ("source_only",) + METHODS + (LATER if toy == "rotated_moons" else ())
    jobs = [(toy, m, s) for m in methods for s in SEEDS[toy]]
    workers = min(2, os.cpu_count() or 1)
    if workers > 1:
        with ProcessPoolExecutor(workers, mp_context=multiprocessing.get_context("spawn")) as pool:
            accs = list(pool.map(_target_accuracy, jobs))
    else:
        accs = [_target_accuracy(job) for job in jobs]
    out: Dict[str, list] = {}
    for (_, method, _), acc in zip(jobs, accs):
        out.setdefault(method, []).append(acc)
    return {m: tuple(a) for m, a in out.items()}


def accuracies(toy: str, method: str) -> Tuple[float, ...]:
    """Target accuracy of ``method`` on ``toy`` for each test seed (source-only is shared by every comparison)."""
    return all_accuracies(toy)[method]


def describe(toy: str, method: str) -> str:
    accs = accuracies(toy, method)
    return (f"{method} {statistics.mean(accs):.3f} ± {statistics.pstdev(accs):.3f} "
            f"[{' '.join(f'{a:.3f}' for a in accs)}]")


def beats_source_only(toy: str, method: str) -> bool:
    return statistics.mean(accuracies(toy, method)) >= statistics.mean(accuracies(toy, "source_only")) + MIN_GAIN


# Known failures on moons, with what was measured (tuning seeds, then test seeds); the test must keep failing.
KNOWN_FAILURES: Dict[str, str] = {
    "cdan": "CDAN does not beat source-only on moons at any setting searched: tuning seeds 100-104 best .781 "
            "(weight 0.1, logistic discriminator) vs .805; test seeds 0-4 .793 vs .802 (measured 2026-12-03)",
    "cdan_e": "CDAN+E does not beat source-only on moons at any setting searched: tuning seeds 100-104 best .781 "
              "(weight 0.1, logistic discriminator) vs .805; test seeds 0-4 .794 vs .802 (measured 2026-12-03)",
    "mcd": "MCD's gain on the tuning seeds 100-104 (.822 vs .805, the paper's n = 4 and weight 1) does not hold on "
           "the test seeds 0-4: .805 vs .802, under the one-point margin (measured 2026-12-03)",
}


@pytest.mark.parametrize("method", [pytest.param(m, marks=pytest.mark.xfail(strict=True, reason=KNOWN_FAILURES[m]))
                                    if m in KNOWN_FAILURES else m for m in METHODS + LATER])
def test_each_method_beats_source_only_on_rotated_moons(method):
    toy = "rotated_moons"
    assert beats_source_only(toy, method), (
        f"{method} does not beat source-only by {MIN_GAIN} on {toy} at 30°, seeds {SEEDS[toy]}: mean target "
        f"accuracy {describe(toy, method)} vs {describe(toy, 'source_only')}")


def test_most_methods_beat_source_only_on_corrupted_digits():
    toy = "corrupted_digits"
    winners = [m for m in METHODS if beats_source_only(toy, m)]
    table = "; ".join(describe(toy, m) for m in ("source_only",) + METHODS)
    assert len(winners) >= 4, (f"only {len(winners)} of 6 methods ({', '.join(winners) or 'none'}) beat source-only "
                               f"by {MIN_GAIN} on {toy}, seeds {SEEDS[toy]}: {table}")
