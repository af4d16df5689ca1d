"""A user's own alignment losses: plain functions of (source features, target features) -> scalar tensor.

Nothing here imports adaptkit. Any such function can train with ``adaptkit.fit(..., method=energy_distance)`` or
join a benchmark grid by its import path::

    adaptkit-bench add_method=examples.my_alignment.energy_distance

adaptkit wraps a plain function with its ``feature_loss`` method: encoder+head ← CE(source) + weight·loss(f_s, f_t).
"""
import torch


def _mean_distance(a: torch.Tensor, b: torch.Tensor, eps: float = 1e-8) -> torch.Tensor:
    """Mean Euclidean distance over all pairs (a_i, b_j). Shape: ``(N, F)``, ``(M, F)`` → scalar.

    ``eps`` inside the square root keeps the gradient finite where two points coincide (the diagonal of a vs a).
    """
    d2 = (a[:, None, :] - b[None, :, :]).pow(2).sum(-1)  # (N, M)
    return (d2 + eps).sqrt().mean()


def energy_distance(source_features: torch.Tensor, target_features: torch.Tensor) -> torch.Tensor:
    """Energy distance between the source and target feature batches (V-statistic):

        E(S, T) = 2·mean‖s − t‖ − mean‖s − s'‖ − mean‖t − t'‖

    (Székely & Rizzo, "Energy statistics: a class of statistics based on distances", J. Stat. Planning and
    Inference 143, 2013). It is zero when the two distributions are equal and positive otherwise, needs no kernel
    bandwidth, and costs O(N·M) per batch.

    Shape: ``(N, F)``, ``(M, F)`` → scalar.

    Example:
        >>> x = torch.randn(64, 8)
        >>> float(energy_distance(x, x)) < 1e-3
        True
    """
    return (2 * _mean_distance(source_features, target_features)
            - _mean_distance(source_features, source_features)
            - _mean_distance(target_features, target_features))


def mean_gap(source_features: torch.Tensor, target_features: torch.Tensor) -> torch.Tensor:
    """Squared distance between the two batches' feature means, ‖mean(S) − mean(T)‖². Shape: ``(N, F)``, ``(M, F)``
    → scalar. The crudest alignment: a linear-kernel MMD."""
    return (source_features.mean(0) - target_features.mean(0)).pow(2).sum()
