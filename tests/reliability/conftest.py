"""Fixtures of the reliability suite: a folder for the servers' logs."""

from __future__ import annotations

from pathlib import Path

import pytest


@pytest.fixture
def logs(tmp_path: Path) -> Path:
    """Where the servers write their output (shown when a server fails to start)."""
    path = tmp_path / "logs"
    path.mkdir()
    return path
