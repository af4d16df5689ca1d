"""A guarded run: candidate runs of a method, a label-free choice among them, and the guard against source-only.

``guard=true`` and/or a method weight of ``auto`` (``method.weight=auto``) turn one run into this procedure:

1. **Source-only reference.** The same recipe with ``method=source_only``, trained fully. Its predictions give the
   label-shift estimate (:mod:`adaptkit.trust.label_shift`) before any alignment can hide the shift, and it is
   the fallback.
2. **Candidates.** With ``weight=auto``, the method at each of ``weight_candidates`` × its default weight
   (log-spaced); otherwise the one given weight. When the estimate is reliable and detects label shift, the
   candidates align with class weights (``class_weights=reestimated``: starting from equal ratios, re-estimated
   from the candidate itself at every evaluation, which beat ratios fixed from the reference on 8 of 9 rows of
   benchmarks/RESULTS.md, "Class weights"), unless class weights were set.
3. **Screening.** With several candidates, each trains for :data:`SCREEN_SHARE` of the steps (a paused run, not a
   shorter one: its schedules are those of the full run). Candidates the evidence already rules out — source
   knowledge lost against the reference at the same step, a collapse onto few classes, or diverged training — are
   dropped; the
   selection rule ``choose_by`` (:mod:`adaptkit.trust.rules`) picks one of the rest, which trains to the end. No
   weighted method of adaptkit has a source-only pretraining stage, so there is no shared prefix to reuse.
4. **Guard** (``guard=true``). The chosen candidate is compared with the reference
   (:func:`adaptkit.trust.guard.judge_candidate`); the adaptation is kept only when the evidence favours it,
   otherwise the reference is returned. Every candidate, its scores, the choice and the guard's reasons are in
   ``summary["trust"]``.

Cost: the reference, plus every candidate for :data:`SCREEN_SHARE` of the steps, plus one candidate to the end;
with the three default candidates about 1 + 3/4 + 3/4 = 2.5 runs, with five 3 runs (benchmarks/RESULTS.md has the measured ratio). Candidates
train in memory; a run folder receives the returned run when everything is done (a guarded run interrupted
before that starts again). Nothing here can show that the kept model is better on the target: that needs labelled
target data.
"""
from __future__ import annotations

import dataclasses
from typing import Any, Callable, Dict, List, Mapping, Optional

import numpy as np
import torch

from ..config import AUTO, RunConfig, config_hash
from ..train.loop import DivergenceError
from . import guard
from .guard import Evidence, evidence_from_outputs, judge_candidate, vanished_classes
from .label_shift import LabelShiftEstimate
from .reference import from_outputs
from .rules import choose

__all__ = ["SCREEN_SHARE", "train_guarded", "model_evidence"]

SCREEN_SHARE = 0.25  # ours: candidates are screened after a quarter of the steps


@torch.no_grad()
def _outputs(model, x: torch.Tensor, domain: str, device) -> tuple:
    model.eval()
    feats, probs = [], []
    for chunk in x.split(1024):
        f = model.features(chunk.to(device), domain)
        feats.append(f.float().cpu())
        probs.append(torch.softmax(model.head(f), 1).float().cpu())
    return torch.cat(feats).numpy(), torch.cat(probs).numpy()


def model_evidence(label: str, model, pair, device, *, class_weighted: bool = False,
                   max_target: int = 2000) -> tuple:
    """``(Evidence, scores)`` of a model on ``pair``: its outputs on the labelled source validation and on (up to
    ``max_target``) unlabelled target training inputs, and the label-free selection scores of them."""
    from ..select import SCORES, ScoreInputs, compute_scores

    fs, ps = _outputs(model, pair.source_val.x, "source", device)
    ft, pt = _outputs(model, pair.target_train_x[:max_target], "target", device)
    ys = pair.source_val.y.numpy()
    ev = evidence_from_outputs(label, fs, ps, ys, ft, pt, class_weighted=class_weighted)
    # every score of SCORES: each one may be the rule choose_by names
    scores = compute_scores(ScoreInputs(fs, ps, ys, ft, pt), names=list(SCORES))
    return ev, scores


def _advance(trainer, step: int) -> None:
    """Train ``trainer`` up to ``step`` (an evaluation happens there), then pause: the run continues later as if
    it had never stopped (the stage bounds and schedules are those of the full run)."""
    trainer.run(until=step)


def _weights(c: RunConfig, parts: Mapping[str, Any]) -> List[Optional[float]]:
    """The candidate weights: ``weight_candidates`` × the method's default weight for ``auto``, else the one given."""
    from ..methods import build_method

    given = c.method.get("weight")
    if given != AUTO:
        return [given]
    options = {k: v for k, v in c.method.items() if k not in ("name", "weight")}
    method = parts.get("method") or build_method(c.method["name"], **options)
    names = [f.name for f in dataclasses.fields(method.options)]
    if "weight" not in names:
        raise ValueError(f"weight={AUTO!r} needs a method with a 'weight' option; method {c.method['name']!r} has "
                         f"none (its options: {', '.join(names) or '(none)'}). Set guard=true alone to compare it "
                         "with source-only.")
    default = float(type(method.options)().weight)
    return [default * m for m in c.weight_candidates]


def _label(name: str, weight: Optional[float], weighted: bool) -> str:
    text = name if weight is None else f"{name} weight {weight:g}"
    return text + (" with class weights" if weighted else "")


def train_guarded(c: RunConfig, parts: Optional[Mapping[str, Any]] = None, *, prepare: Callable,
                  complete: Callable, save: Callable):
    """Run the guarded procedure of the module docstring for the resolved config ``c`` and return the
    :class:`adaptkit.Run` it keeps. ``prepare``/``complete``/``save`` are :mod:`adaptkit.run`'s (passed in, so
    this layer sits above the loop without the run module importing it back)."""
    parts = dict(parts or {})
    weights = _weights(c, parts)
    if "method" in parts and len(weights) > 1:
        raise ValueError(f"weight={AUTO!r} builds one method per candidate weight, so the method must be given by "
                         "name (or import path), not as an object.")
    base = dataclasses.replace(c, guard=False, run_dir=None, diagnostics=False)
    screen = max(1, int(round(c.steps * SCREEN_SHARE)))
    screening = len(weights) > 1 and screen < c.steps

    # 1. the source-only reference
    ref_c = dataclasses.replace(base, method={"name": "source_only"}, class_weights="none", target_terms={})
    ref_p = prepare(ref_c, {k: v for k, v in parts.items() if k != "method"})
    if screening:
        _advance(ref_p.trainer, screen)
        ref_screen, _ = model_evidence("source_only", ref_p.model, ref_p.pair, ref_p.device)
    ref_run = complete(ref_p)
    ref_final, ref_scores = model_evidence("source_only", ref_p.model, ref_p.pair, ref_p.device)
    pair = ref_p.pair
    estimate_dict = from_outputs(ref_final.source_probs, pair.source_val.y.numpy(), ref_final.target_probs,
                                 "the guard's source-only reference run", seed=c.seed)
    estimate = None if "error" in estimate_dict else LabelShiftEstimate(**estimate_dict)

    # 2. the candidates
    weight_by_estimate = (c.class_weights == "none" and estimate is not None and estimate.reliable
                          and estimate.shifted)
    class_weights = "reestimated" if weight_by_estimate else c.class_weights
    weighted = class_weights != "none"
    cand_parts = {**{k: v for k, v in parts.items() if k != "estimate"}, "data": pair}
    if weighted and class_weights in ("estimated", "reestimated"):
        cand_parts["estimate"] = estimate_dict
    records: List[Dict[str, Any]] = []
    prepared = []
    for w in weights:
        method = dict(c.method) if w is None else {**c.method, "weight": w}
        cc = dataclasses.replace(base, method=method, class_weights=class_weights)
        prepared.append(prepare(cc, cand_parts))
        records.append({"candidate": _label(c.method["name"], w, weighted), "weight": w, "class_weights": weighted})

    # 3. screening
    chosen = 0
    rule_note = "one candidate"
    if screening:
        scored = []
        for i, p in enumerate(prepared):
            try:
                _advance(p.trainer, screen)
            except DivergenceError as e:  # a candidate weight too large for this data: dropped, not fatal
                records[i]["dropped"] = f"training diverged ({str(e).split('. ')[0]})"
                scored.append(None)
                continue
            ev, scores = model_evidence(records[i]["candidate"], p.model, p.pair, p.device, class_weighted=weighted)
            records[i]["screen_scores"] = scores
            out = _ruled_out(ref_screen, ev, estimate)
            records[i]["dropped"] = out
            scored.append(None if out else scores)
        alive = [i for i, s in enumerate(scored) if s is not None]
        if alive:
            pick = choose([scored[i] for i in alive], c.choose_by)
            chosen = alive[pick if pick is not None else 0]
            rule_note = f"rule {c.choose_by!r} among {len(alive)} of {len(prepared)} candidates at step {screen}"
        else:
            chosen = None
            rule_note = f"every candidate was ruled out at step {screen}"
    trust: Dict[str, Any] = {"label_shift": estimate_dict, "class_weights": class_weights, "candidates": records,
                             "choice": rule_note, "screen_step": screen if screening else None,
                             "guard": c.guard}

    # 4. the chosen candidate to the end, then the guard
    verdict = None
    if chosen is not None:
        records[chosen]["chosen"] = True
        try:
            run = complete(prepared[chosen])
        except DivergenceError as e:  # screened healthy, diverged later: the reference is kept
            when = " after screening" if screening else ""
            records[chosen]["dropped"] = f"training diverged{when} ({str(e).split('. ')[0]})"
            rule_note += f"; {records[chosen]['candidate']} then diverged"
            chosen = None
    trust["choice"] = rule_note
    if chosen is None:
        keep, reasons = False, [f"no candidate survived ({rule_note}); "
                                + "; ".join(f"{r['candidate']}: {r['dropped']}" for r in records if r.get("dropped"))]
    else:
        ev, scores = model_evidence(records[chosen]["candidate"], prepared[chosen].model, pair,
                                    prepared[chosen].device, class_weighted=weighted)
        records[chosen]["final_scores"] = scores
        verdict = judge_candidate(ref_final, ev, estimate, seed=c.seed, scores=guard.VOTING_SCORES,
                                  no_estimate_because=estimate_dict.get("error")) if c.guard else None
        keep = verdict.keep if verdict is not None else True
        reasons = verdict.reasons if verdict is not None else [f"{records[chosen]['candidate']} chosen by {rule_note}"]
    if verdict is not None:
        trust["verdict"] = verdict.as_dict()
    trust["kept"] = records[chosen]["candidate"] if keep else "source_only"
    trust["reasons"] = reasons
    trust["source_only_scores"] = ref_scores
    trust["source_only_target_proportions"] = ref_final.target_proportions.tolist()  # mean probabilities, check 3
    result, kept_p = (run, prepared[chosen]) if keep else (ref_run, ref_p)
    trust["kept_config_hash"] = result.summary.get("config_hash")  # the kept candidate's (its checkpoint's)
    result.summary["trust"] = trust
    result.summary["config_hash"] = config_hash(c)  # the settings asked for: what a grid compares
    result.summary["decision"] = (f"kept {trust['kept']}" if keep else "fell back to source-only") + ": " + \
        reasons[-1 if keep else 0]
    if c.run_dir is not None:
        kept_p.config.run_dir, kept_p.config.overwrite = c.run_dir, c.overwrite
        save(result, kept_p)
        result.run_dir = kept_p.run_dir
    return result


def _ruled_out(reference: Evidence, candidate: Evidence, estimate) -> Optional[str]:
    """Why screening drops ``candidate`` (source knowledge lost, or a collapse), or None."""
    from .guard import source_accuracy, source_drop_allowed

    ratios = estimate.ratios if (candidate.class_weighted and estimate is not None) else None
    ref_acc, cand_acc = source_accuracy(reference, ratios), source_accuracy(candidate, ratios)
    if ref_acc - cand_acc > source_drop_allowed(candidate):
        return f"source-validation accuracy {cand_acc:.3f} against {ref_acc:.3f} for source-only at the same step"
    gone = vanished_classes(candidate.target_proportions, reference, estimate)
    if gone:
        return f"its target predictions collapsed: classes {gone} all but vanished"
    return None
