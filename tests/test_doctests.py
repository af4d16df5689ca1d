"""Every docstring example in the package runs (the examples are documentation; documentation must not lie)."""
import doctest
import importlib
import pkgutil

import pytest

import adaptkit

MODULES = sorted(m.name for m in pkgutil.walk_packages(adaptkit.__path__, "adaptkit."))


@pytest.mark.parametrize("name", MODULES)
def test_docstring_examples_run(name, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)  # an example that writes files writes them here
    module = importlib.import_module(name)
    result = doctest.testmod(module, optionflags=doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE)
    assert result.failed == 0, f"{result.failed} of {result.attempted} examples failed in {name}"
