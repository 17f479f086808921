"""The engine must import on a server without Qt, napari or magicgui."""
from __future__ import annotations

import subprocess
import sys

GUI_MODULES = ("PyQt5", "PyQt6", "PySide2", "PySide6", "qtpy", "napari", "magicgui", "vispy", "superqt")


def test_importing_the_checker_loads_no_gui_module():
    code = (
        "import sys, reconaudit.checker, reconaudit.checker.cli, reconaudit.checker.batch, "
        "reconaudit.checker.runner, reconaudit.checker.pipeline, reconaudit.checker.analyses as a\n"
        "[a.get(n) for n in a.available()]\n"
        "import reconaudit.checker.report, reconaudit.checker.history\n"
        f"bad = [m for m in sys.modules if m.split('.')[0] in {GUI_MODULES!r}]\n"
        "print(','.join(bad))"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "", f"GUI modules imported by the checker: {out.stdout}"


def test_no_gui_import_statement_in_checker_sources():
    from pathlib import Path
    import re

    root = Path(__file__).resolve().parents[2] / "checker"
    pattern = re.compile(r"^\s*(import|from)\s+(" + "|".join(GUI_MODULES) + r")\b", re.M)
    offenders = [str(p) for p in root.rglob("*.py") if pattern.search(p.read_text(encoding="utf-8"))]
    assert offenders == []
