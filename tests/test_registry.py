"""The registries (adaptkit/registry.py): a name → component table whose errors list what is accepted."""
import re
import sys

import pytest

from adaptkit.registry import Registry, import_object


def test_register_get_and_names():
    r = Registry("widget")

    @r.register("b")
    def b():
        return 2

    r.register("a")(len)
    assert r.get("b") is b and r.names() == ["a", "b"] and "a" in r and "c" not in r
    r.register("b")(b)  # the same object again is fine (a module imported twice)
    with pytest.raises(ValueError, match="widget 'b' is registered twice"):
        r.register("b")(len)


def test_unknown_names_list_the_registered_ones():
    r = Registry("widget")
    r.register("x")(len)
    with pytest.raises(ValueError, match=re.escape("Unknown widget 'y'. Available widgets: x.")):
        r.get("y")
    with pytest.raises(TypeError, match=re.escape("The widget name must be a string; got int 3.")):
        r.get(3)


def test_import_object_resolves_dotted_paths_and_refuses_others(tmp_path, monkeypatch):
    import math

    assert import_object("math.sqrt") is math.sqrt
    for bad in ("sqrt", "../x.y", "os.path/join", "a..b", ".rel"):
        with pytest.raises(ImportError, match="is not of the form 'package.module.attribute'"):
            import_object(bad)
    # a module in the current directory is found, as `python -m` would find it, after installed packages
    (tmp_path / "my_local_mod.py").write_text("VALUE = 41 + 1\n")
    monkeypatch.chdir(tmp_path)
    monkeypatch.setattr(sys, "path", [p for p in sys.path if p not in ("", str(tmp_path))])
    assert import_object("my_local_mod.VALUE") == 42
    assert sys.path[-1] == str(tmp_path)
