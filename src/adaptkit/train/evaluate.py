"""Periodic evaluation: accuracy and loss on labelled scoring sets, label-free selection scores on the target.

Target labels appear here, and only here, for *reporting*: nothing computed from them flows back into training.
"""
from __future__ import annotations

from typing import Dict, Iterable, Optional, Sequence, Tuple

import torch
import torch.nn.functional as F

from ..nets.model import AdaptedModel

# metric prefix for each scoring set of DomainPair.scoring_sets()
SET_PREFIX = {"source_val": "source_val", "target_test": "target"}


def _chunks(x: torch.Tensor, y: Optional[torch.Tensor], size: int):
    for i in range(0, x.shape[0], size):
        yield x[i:i + size], (None if y is None else y[i:i + size])


@torch.no_grad()
def model_outputs(model: AdaptedModel, batches: Iterable, domain: str, device) -> Tuple[torch.Tensor, torch.Tensor,
                                                                                        Optional[torch.Tensor]]:
    """Features, class probabilities and labels (None when unlabelled) over an iterable of (x, y) batches."""
    feats, probs, labels = [], [], []
    for x, y in batches:
        f = model.features(x.to(device), domain)  # (B, d)
        feats.append(f.float().cpu())
        probs.append(F.softmax(model.head(f), dim=1).float().cpu())
        if y is not None:
            labels.append(y.cpu())
    if not feats:
        raise ValueError(f"no samples to evaluate on the {domain} side")
    return torch.cat(feats), torch.cat(probs), (torch.cat(labels) if labels else None)


class Evaluator:
    """Callable ``model -> {metric: value}``.

    Args:
        labelled: name → (x, y) tensors, or name → iterable of (x, y) batches; names from
            ``DomainPair.scoring_sets`` (``source_val``, ``target_test``).
        target_unlabelled: target inputs the label-free scores may use (the target *training* inputs).
        scores: names of label-free selection scores to compute (see :mod:`adaptkit.select`).
        max_unlabelled: cap on target samples used for scores (the first ones of a fixed order).
    """

    def __init__(self, labelled: Dict[str, object], target_unlabelled: Optional[torch.Tensor] = None,
                 device="cpu", batch_size: int = 1024, scores: Sequence[str] = (), max_unlabelled: int = 2000):
        self.labelled, self.device, self.batch_size = labelled, torch.device(device), batch_size
        self.target_unlabelled = None if target_unlabelled is None else target_unlabelled[:max_unlabelled]
        self.scores = list(scores)

    def _iter(self, data):
        from ..data.pair import LabelledSet

        if isinstance(data, LabelledSet):
            return _chunks(data.x, data.y, self.batch_size)
        if isinstance(data, tuple) and len(data) == 2 and isinstance(data[0], torch.Tensor):
            return _chunks(data[0], data[1], self.batch_size)
        return data

    def __call__(self, model: AdaptedModel) -> Dict[str, Optional[float]]:
        out: Dict[str, Optional[float]] = {}
        cache = {}
        for name, data in self.labelled.items():
            domain = "source" if name.startswith("source") else "target"
            f, p, y = model_outputs(model, self._iter(data), domain, self.device)
            cache[name] = (f, p, y)
            prefix = SET_PREFIX.get(name, name)
            out[f"{prefix}_accuracy"] = float((p.argmax(1) == y).float().mean())
            out[f"{prefix}_loss"] = float(F.nll_loss(torch.log(p.clamp_min(1e-12)), y))
        if self.scores:
            out.update(self._selection_scores(model, cache))
        return out

    def _selection_scores(self, model: AdaptedModel, cache) -> Dict[str, Optional[float]]:
        from ..select import ScoreInputs, compute_scores

        if self.target_unlabelled is None or "source_val" not in cache:
            return {k: None for k in self.scores}
        ft, pt, _ = model_outputs(model, _chunks(self.target_unlabelled, None, self.batch_size), "target", self.device)
        fv, pv, yv = cache["source_val"]
        inputs = ScoreInputs(source_feats=fv.numpy(), source_probs=pv.numpy(), source_labels=yv.numpy(),
                             target_feats=ft.numpy(), target_probs=pt.numpy())
        return {f"score/{k}": v for k, v in compute_scores(inputs, names=self.scores).items()}
