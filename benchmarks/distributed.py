"""1 process vs 2 processes (gloo, CPU) on the same global batch: per-step losses and final target accuracy.

Runs CORAL, MMD and DANN for 50 steps (eval_every=1, so every step's losses are recorded) once in this process
and once over two spawned processes joined through torchrun's environment variables, then prints, per method,
the largest difference of any recorded loss over the 50 steps and of the final target accuracy.

    PYTHONPATH=$PWD/src python benchmarks/distributed.py [--steps 50] [--batch-size 64]
"""
import argparse
import os
import socket
import tempfile
from pathlib import Path

import torch
import torch.multiprocessing as mp

METHODS = ("coral", "mmd", "dann")


def settings(steps: int, batch_size: int) -> dict:
    return dict(data="rotated_moons", steps=steps, batch_size=batch_size, eval_every=1, diagnostics=False,
                device="cpu", seed=0, progress=False)


def runs(run: dict) -> dict:
    from adaptkit import fit

    return {m: fit(method=m, **run).history for m in METHODS}


def worker(rank: int, port: int, out: str, run: dict) -> None:
    torch.set_num_threads(1)
    os.environ.update(MASTER_ADDR="127.0.0.1", MASTER_PORT=str(port), WORLD_SIZE="2", RANK=str(rank),
                      LOCAL_RANK=str(rank))
    histories = runs(run)
    if rank == 0:
        torch.save(histories, Path(out) / "two.pt")
    torch.distributed.destroy_process_group()


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--steps", type=int, default=50)
    ap.add_argument("--batch-size", type=int, default=64)
    a = ap.parse_args()
    run = settings(a.steps, a.batch_size)
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    with tempfile.TemporaryDirectory() as out:
        mp.spawn(worker, args=(port, out, run), nprocs=2, join=True)
        two = torch.load(Path(out) / "two.pt", weights_only=True)
    one = runs(run)
    print("| method | steps | batch | max abs Δ of any logged loss, all steps | final target accuracy 1 proc / 2 procs |")
    print("| --- | --- | --- | --- | --- |")
    for m in METHODS:
        diff = max(abs(r1[k] - r2[k]) for r1, r2 in zip(one[m], two[m]) for k in r1
                   if k.startswith(("loss/", "classify_align/", "adversarial/")) and isinstance(r1[k], float))
        a1, a2 = one[m][-1]["target_accuracy"], two[m][-1]["target_accuracy"]
        print(f"| {m} | {a.steps} | {a.batch_size} | {diff:.2e} | {a1:.4f} / {a2:.4f} |")


if __name__ == "__main__":
    main()
