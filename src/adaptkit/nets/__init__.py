"""Networks: encoders (inputs → features), heads (features → class logits), domain discriminators.

Any ``nn.Module`` can stand in for an encoder or a head; :func:`feature_size` finds an encoder's output width.
"""
from .discriminators import DomainHead
from .encoders import ENCODERS, LeNet, MLPEncoder, SmallCNN, build_encoder, feature_size
from .heads import HEADS, LinearHead, MLPHead, build_head
from .model import AdaptedModel
from .modes import module_mode
from .resnet import ResNet18, ResNet50, ResNetEncoder

__all__ = ["AdaptedModel", "DomainHead", "ENCODERS", "HEADS", "LeNet", "LinearHead", "MLPEncoder", "MLPHead",
           "ResNet18", "ResNet50", "ResNetEncoder", "SmallCNN", "build_encoder", "build_head", "feature_size", "module_mode"]
