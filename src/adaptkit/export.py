"""Export a trained predictor for deployment with torch's own exporter: :func:`export_run` writes the network that
predicts target class probabilities as a ``torch.export`` program (``.pt2``), loadable without adaptkit.

The exported network is what :meth:`adaptkit.Run.predict_proba` computes: the encoder that serves the target (for
ADDA the run's own target encoder), the head, a softmax — in evaluation mode (dropout off), on the CPU, for any
batch size. Where ``torch.export`` is missing (torch < 2.1) a TorchScript trace is written instead.

Load it back (no adaptkit needed)::

    program = torch.export.load("model.pt2")        # TorchScript: torch.jit.load("model.pt")
    probabilities = program.module()(x)             # (B, n_classes)
"""
from __future__ import annotations

import copy
from pathlib import Path
from typing import Optional, Union

import torch
from torch import nn

from .run import Run
from .train import files


class Predictor(nn.Module):
    """``x -> softmax(head(encoder(x)))`` with the encoder fixed to the one that serves ``domain`` now — no
    branch on the model's flags, so the exporter sees one straight graph.

    Shape: x ``(B, *input_shape)`` → probabilities ``(B, n_classes)``.
    """

    def __init__(self, model, domain: str = "target"):
        super().__init__()
        self.encoder = model.encoder_for(domain)
        self.head = model.head

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return torch.softmax(self.head(self.encoder(x)), dim=1)  # (B, n_classes)


def _example(run: Run, example) -> torch.Tensor:
    if example is not None:
        return torch.as_tensor(example, dtype=torch.float32).cpu()
    shape = tuple(run.data.input_shape) if run.data is not None else run.summary.get("input_shape")
    if shape is None:
        raise ValueError("export_run needs an example input (example=...): this run records no input shape.")
    return torch.zeros((2, *shape))  # two rows: a batch of one would fix the batch size in the program


def export_run(run: Union[Run, str, Path], path: Union[str, Path], *, example=None, domain: str = "target") -> Path:
    """Write ``run``'s predictor (a :class:`Run`, or a run folder, loaded with :func:`adaptkit.load_run`) to
    ``path`` as a ``torch.export`` program, its batch size free; returns the path written (atomically).

    Args:
        run: a trained :class:`Run` (left unchanged) or a run folder.
        path: the file to write; ``.pt2`` is the usual suffix (TorchScript fallback: any).
        example: an input batch of the model's input shape (default: zeros of the recorded shape).
        domain: ``"target"`` (default; the deployed use) or ``"source"``: whose encoder the predictor uses.

    Example:
        >>> export_run(run, "model.pt2")  # doctest: +SKIP
        >>> torch.export.load("model.pt2").module()(torch.zeros(4, 2)).shape  # doctest: +SKIP
        torch.Size([4, 2])
    """
    if not isinstance(run, Run):
        from .saved import load_run

        run = load_run(run)
    if domain not in ("source", "target"):
        raise ValueError(f"The 'domain' parameter of export_run must be 'source' or 'target'. Got {domain!r} instead.")
    net = Predictor(copy.deepcopy(run.model).cpu(), domain).eval()  # a copy: the run keeps its device and mode
    x = _example(run, example)
    if x.dim() < 2 or x.shape[0] < 2:
        raise ValueError(f"export_run's example must be a batch of at least 2 rows of the input shape; got shape "
                         f"{tuple(x.shape)}.")
    with torch.no_grad():
        if hasattr(torch, "export") and hasattr(torch.export, "export"):
            batch = torch.export.Dim("batch")
            program = torch.export.export(net, (x,), dynamic_shapes=({0: batch},))
            return files.write_with(path, lambda f: torch.export.save(program, f))
        traced = torch.jit.trace(net, (x,))  # pragma: no cover — torch < 2.1
        return files.write_with(path, lambda f: torch.jit.save(traced, f))  # pragma: no cover
