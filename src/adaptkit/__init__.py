"""adaptkit: unsupervised domain-adaptation trainers — one loop, interchangeable parts."""
__version__ = "0.1.0"
