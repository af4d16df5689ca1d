"""Data: the DomainPair (labelled source, unlabelled target), paired batching, the bundled toy shifts, image
folders on disk (``data=image_folders``), the digit benchmarks' own files (``data=mnist_usps``, ``usps_mnist``,
``svhn_mnist``) and the user's own table (``data=table``)."""
from .batches import Batch, LoaderBatches, PairedBatches
from .digits_files import MissingDataFile, digit_pair, read_digits
from .folders import IMAGENET_MEAN, IMAGENET_STD, image_folder_pair, image_folders, image_transform, read_image_folder
from .pair import UNLABELLED, DomainPair, LabelledSet, TrainingData
from .streaming import DatasetPair, StreamingBatches
from .shifts import SHIFTS, corrupted_digits, make_shift, rotated_moons, selection_bias, shifted_blobs
from . import table  # the user's own file as a pair: data=table (adaptkit.data.table.table)

__all__ = [
    "DomainPair", "TrainingData", "LabelledSet", "UNLABELLED",
    "Batch", "PairedBatches", "LoaderBatches", "DatasetPair", "StreamingBatches",
    "SHIFTS", "make_shift", "rotated_moons", "shifted_blobs", "corrupted_digits", "selection_bias",
    "image_folder_pair", "image_folders", "image_transform", "digit_pair", "read_digits", "MissingDataFile", "read_image_folder", "IMAGENET_MEAN", "IMAGENET_STD",
]
