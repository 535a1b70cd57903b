"""shared/ stays pure: importing it must not pull in the web stack (checked in a clean process)."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
WEB_STACK = ("fastapi", "sqlalchemy", "jinja2", "plotly", "starlette")

PROBE = f"""
import json, sys
import shared, shared.acceptance, shared.fitting, shared.foldback, shared.uncertainty
loaded = {{name.split(".")[0] for name in sys.modules}}
print(json.dumps({{"file": shared.__file__, "web": sorted(loaded & set({WEB_STACK!r}))}}))
"""


def test_shared_imports_no_web_stack() -> None:
    out = subprocess.run(
        [sys.executable, "-c", PROBE],
        cwd=ROOT,
        capture_output=True,
        text=True,
        check=True,
        timeout=60,
    )
    report = json.loads(out.stdout)
    assert Path(report["file"]).resolve() == ROOT / "shared" / "__init__.py"
    assert report["web"] == []
