"""Every summary.json records the versions it was trained with: adaptkit, torch, numpy, Python (and torchvision
when installed), read back and compared with the modules' own ``__version__`` (torchvision: its package metadata)."""
import json
import platform
import sys
import tomllib
from pathlib import Path

import numpy as np
import pytest
import torch

import adaptkit

MOONS = {"n_source": 100, "n_target": 100}


def _expected():
    want = {"adaptkit": adaptkit.__version__, "torch": torch.__version__, "numpy": np.__version__,
            "python": platform.python_version()}
    from importlib import metadata  # torchvision is installed here: recorded whether or not the run imported it

    want["torchvision"] = metadata.version("torchvision")
    return want


def test_adaptkit_version_is_the_one_pyproject_declares():
    project = tomllib.loads((Path(__file__).resolve().parents[1] / "pyproject.toml").read_text())
    assert adaptkit.__version__ == project["project"]["version"]


@pytest.mark.parametrize("settings", [{}, {"guard": True}], ids=["plain", "guarded"])
def test_every_summary_records_the_versions(tmp_path, settings):
    adaptkit.fit("rotated_moons", method="coral", steps=20, progress=False, run_dir=str(tmp_path / "run"),
                 data_options=MOONS, diagnostics=False, **settings)
    summary = json.loads((tmp_path / "run" / "summary.json").read_text())
    assert summary["versions"] == _expected()
    assert summary["versions"]["python"] == ".".join(map(str, sys.version_info[:3]))  # the interpreter's own words
