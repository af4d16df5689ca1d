"""Data: the DomainPair (labelled source, unlabelled target), paired batching, and the bundled toy shifts."""
from .batches import Batch, LoaderBatches, PairedBatches
from .pair import UNLABELLED, DomainPair, LabelledSet, TrainingData
from .shifts import SHIFTS, corrupted_digits, make_shift, rotated_moons, selection_bias, shifted_blobs

__all__ = [
    "DomainPair", "TrainingData", "LabelledSet", "UNLABELLED",
    "Batch", "PairedBatches", "LoaderBatches",
    "SHIFTS", "make_shift", "rotated_moons", "shifted_blobs", "corrupted_digits", "selection_bias",
]
