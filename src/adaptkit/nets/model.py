"""AdaptedModel: encoder → features → head → logits, with one encoder per domain (shared unless unshared)."""
from __future__ import annotations

import copy

import torch
from torch import nn


class AdaptedModel(nn.Module):
    """The trained classifier. It owns its encoders: ``source_encoder`` (the ``encoder`` it was built with) and
    ``target_encoder``, which is the *same module* unless a method calls :meth:`unshare_target_encoder` (ADDA).

    ``forward(x)`` predicts for *target* data (the deployed use); ``forward(x, domain="source")`` uses the source
    encoder. Target data go through the unshared encoder only once :meth:`start_target_encoder` has run; the flag
    ``target_encoder_active`` is a buffer, so a checkpoint remembers it.

    Shape: x ``(B, *input_shape)`` → logits ``(B, n_classes)``.

    Example:
        >>> m = AdaptedModel(nn.Linear(2, 4), nn.Linear(4, 3), feature_dim=4, n_classes=3)
        >>> m.target_encoder is m.source_encoder, m(torch.zeros(5, 2)).shape
        (True, torch.Size([5, 3]))
    """

    def __init__(self, encoder: nn.Module, head: nn.Module, feature_dim: int, n_classes: int):
        super().__init__()
        self.encoder = encoder
        self.head = head
        self.register_buffer("target_encoder_active", torch.tensor(False))
        self.feature_dim = feature_dim
        self.n_classes = n_classes

    @property
    def source_encoder(self) -> nn.Module:
        """M_s: the encoder of source data (and of target data while the encoders are shared)."""
        return self.encoder

    @property
    def target_encoder(self) -> nn.Module:
        """M_t: the unshared target encoder once :meth:`unshare_target_encoder` has run, else ``source_encoder``."""
        # Held as the submodule "target_encoder" (state-dict keys "target_encoder.*"); a property on the class is
        # found before nn.Module's lookup of submodules, so it answers for both cases.
        unshared = self._modules.get("target_encoder")
        return self.encoder if unshared is None else unshared

    @property
    def encoders_shared(self) -> bool:
        return "target_encoder" not in self._modules

    def unshare_target_encoder(self) -> nn.Module:
        """Give the target domain its own encoder, a copy of the source encoder, and return it.

        Call it in a method's ``setup``: the copy is registered at once, so every state dict (and checkpoint) has
        the same keys from setup on. Target data keep going through the source encoder until
        :meth:`start_target_encoder`.
        """
        if not self.encoders_shared:
            raise RuntimeError("the target encoder is already unshared; attach a method that unshares it to a "
                               "freshly built AdaptedModel")
        # straight into the registry: add_module refuses a name the class already has (the property above)
        self._modules["target_encoder"] = copy.deepcopy(self.encoder)
        return self.target_encoder

    def start_target_encoder(self) -> None:
        """M_t ← M_s (weights and buffers), then send target data through M_t (ADDA's adapt stage starts)."""
        if self.encoders_shared:
            raise RuntimeError("start_target_encoder needs an unshared target encoder; call "
                               "unshare_target_encoder() in the method's setup first")
        self.target_encoder.load_state_dict(self.encoder.state_dict())
        self.target_encoder_active.fill_(True)

    def encoder_for(self, domain: str) -> nn.Module:
        """The encoder that serves ``domain`` ("source" or "target") now."""
        if domain not in ("source", "target"):
            raise ValueError(f"domain must be 'source' or 'target'; got {domain!r}.")
        # the shared case first: no read of the flag (on a GPU each read waits for the device)
        if domain == "target" and not self.encoders_shared and bool(self.target_encoder_active):
            return self.target_encoder
        return self.encoder

    def features(self, x: torch.Tensor, domain: str = "target") -> torch.Tensor:
        hook = self.__dict__.get("_features_hook")  # set by train/distributed.py inside an update of a torchrun run
        if hook is not None:
            return hook(self.encoder_for(domain), x)  # this rank's rows encoded, every rank's gathered: (B, F)
        return self.encoder_for(domain)(x)  # (B, feature_dim)

    def forward(self, x: torch.Tensor, domain: str = "target") -> torch.Tensor:
        return self.head(self.features(x, domain))  # (B, n_classes)
