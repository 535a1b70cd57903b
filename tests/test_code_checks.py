"""The code checks of `make lint` as tests, so that CI holds every change to them: ruff (lint
and format) and mypy (strict, with the pydantic plugin, on `shared` and `server`)."""

from __future__ import annotations

import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from tests.conftest import missing

ROOT = Path(__file__).resolve().parent.parent
BIN = Path(sys.executable).parent


def tool(name: str) -> str:
    found = BIN / name if (BIN / name).exists() else shutil.which(name)
    if found is None:
        missing(f"{name} is not installed (pip install -e '.[dev]')")
    return str(found)


@pytest.mark.parametrize(
    "args",
    [["ruff", "check", "."], ["ruff", "format", "--check", "."], ["mypy"]],
    ids=["ruff-check", "ruff-format", "mypy"],
)
def test_code_check_passes(args: list[str]) -> None:
    done = subprocess.run(
        [tool(args[0]), *args[1:]], cwd=ROOT, capture_output=True, text=True, timeout=600
    )
    assert done.returncode == 0, f"{' '.join(args)}:\n{done.stdout}\n{done.stderr}"
