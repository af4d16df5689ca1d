"""The version of adaptkit (also in pyproject.toml: keep the two equal)."""
__version__ = "0.1.0"
