"""The class weights a run trains with (``class_weights``): fixed ratios, ratios estimated once before training, or
ratios re-estimated during training (:mod:`adaptkit.trust.reweighting`), and their record in the summary."""
from __future__ import annotations

from typing import Any, Dict, Optional

import torch

from ..data.streaming import DatasetPair

__all__ = ["with_class_weights", "class_weights_for", "final_class_weights"]


def with_class_weights(data, ratios) -> Any:
    """``data`` (a :class:`~adaptkit.data.pair.TrainingData`) with each source sample weighted by its class's
    target/source ratio (times any weight it already had): every loss that honours the batch's ``w_src`` — the
    source cross-entropy and every bundled alignment term — then treats the source as if it had the target's
    class proportions (class-importance weighting; Combes, Zhao, Wang & Gordon, NeurIPS 2020 [memory])."""
    import dataclasses

    r = torch.as_tensor(list(ratios), dtype=torch.float32)
    if r.numel() < int(data.source_y.max()) + 1:
        raise ValueError(f"class_weights has {r.numel()} ratios, but the source has {int(data.source_y.max()) + 1} "
                         "classes; give one ratio per class.")
    w = r[data.source_y]
    if data.source_w is not None:
        w = w * data.source_w
    return dataclasses.replace(data, source_w=w)


def final_class_weights(p) -> Dict[str, Any]:
    """The summary's record of the class weights: for ``reestimated``, the ratios in use at the end."""
    if p.config.class_weights != "reestimated":
        return p.class_weights
    from .reweighting import Reestimating

    evaluator = p.trainer.evaluate
    out = {**p.class_weights, "ratios": p.trainer.batches.ratios.tolist()}
    if isinstance(evaluator, Reestimating) and evaluator.notes:
        out["notes"] = list(evaluator.notes)
    return out


def class_weights_for(c, pair, estimate: Optional[Dict[str, Any]]) -> Optional[Dict[str, Any]]:
    """The class weights a run trains with, and where they came from (for the summary); None: unweighted."""
    if isinstance(c.class_weights, str) and c.class_weights == "none":
        return None
    if c.class_weights == "reestimated":  # from the model being trained (adaptkit.trust.reweighting)
        return {"ratios": [1.0] * pair.n_classes, "from": "re-estimated from the model at every evaluation, "
                "starting from equal weights"}
    if not isinstance(c.class_weights, str):
        if len(c.class_weights) != pair.n_classes:
            raise ValueError(f"The 'class_weights' parameter of the run settings lists {len(c.class_weights)} ratios "
                             f"for {pair.n_classes} classes; give one per class.")
        return {"ratios": list(c.class_weights), "from": "given"}
    if estimate is None:  # "(re)estimated": from a source-trained model before training (the reference black box)
        from . import reference

        estimate = reference.from_inputs(pair.in_memory_sample() if isinstance(pair, DatasetPair) else pair,
                                         seed=c.seed)
    if "error" in estimate:
        return {"ratios": [1.0] * pair.n_classes, "from": f"not estimated ({estimate['error']}); unweighted"}
    note = "" if estimate.get("reliable") else " (the estimate is marked unreliable: see label_shift.notes)"
    return {"ratios": list(estimate["ratios"]), "from": f"estimated from {estimate['estimated_from']}{note}"}
