"""Shared test helpers (kept small): writing scene files and calling the CLI in-process."""
from __future__ import annotations

import json
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
SCENES = ROOT / "scenes"


@pytest.fixture
def run_cli(capsys):
    """Call ``adapt.cli.main.main(argv)``; return (exit code, stdout, stderr)."""
    from adapt.cli.main import main

    def call(argv):
        try:
            code = main([str(a) for a in argv])
        except SystemExit as exc:          # argparse --help / --version
            code = exc.code
        out = capsys.readouterr()
        return code, out.out, out.err

    return call


@pytest.fixture
def write_file(tmp_path):
    """Write text (str) or raw bytes to tmp_path/name; return the path as text."""
    def write(name: str, content) -> str:
        path = tmp_path / name
        if isinstance(content, bytes):
            path.write_bytes(content)
        else:
            path.write_text(content, encoding="utf-8")
        return str(path)

    return write


def without_timing(metrics: dict) -> dict:
    """A metrics / record mapping as plain JSON data without its timing fields (the only
    values that differ between otherwise identical runs)."""
    from adapt import io
    m = json.loads(json.dumps(io.to_jsonable(metrics)))
    m.pop("seconds", None)
    for p in m.get("processors", []):
        p.pop("seconds", None)
    return m
