"""House rule: the physics modules of analysis/ are pure numpy/scipy (no server, web or database stack)."""

from __future__ import annotations

import subprocess
import sys


def test_physics_modules_import_no_server_stack():
    code = (
        "import sys; from analysis.physics import stability, modal, window, trend; "
        "from analysis.sim import simulate, sim_models, sim_history, sim_scoring; "
        "heavy = ('server', 'fastapi', 'sqlalchemy', 'starlette', 'pydantic', 'plotly'); "
        "print([m for m in heavy if m in sys.modules])"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]"
