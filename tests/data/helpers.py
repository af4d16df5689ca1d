"""Helpers shared by the data tests."""
import sys

from adaptkit import cli


def train_cli(args, monkeypatch, capsys):
    """``adaptkit-train`` in this process (its console-script function with ``args`` in ``sys.argv``, as the script
    would run it): ``(exit status, stdout, stderr)``."""
    monkeypatch.setattr(sys, "argv", ["adaptkit-train"] + args)
    monkeypatch.setenv("HYDRA_FULL_ERROR", "0")
    try:
        cli.train_main()
        code = 0
    except SystemExit as e:
        code = e.code
    out = capsys.readouterr()
    return code, out.out, out.err
