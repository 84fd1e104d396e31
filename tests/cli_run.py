"""The console entry point run in the test's own process (shared by the CLI tests)."""

from __future__ import annotations

import sys

from dyadperm import cli


def run_cli(monkeypatch, capsys, *args) -> tuple[int, str, str]:
    """``dyadperm ARGS`` in this process: (exit code, stdout, stderr)."""
    monkeypatch.setattr(sys, "argv", ["dyadperm", *map(str, args)])
    code = 0
    try:
        cli.main()
    except SystemExit as exc:
        code = int(exc.code or 0)
    out = capsys.readouterr()
    return code, out.out, out.err
