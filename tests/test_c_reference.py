"""Runs the C reference's own tests (plain and under ASan + UBSan) and its vector cross-check."""

from __future__ import annotations

import shutil
import subprocess
from pathlib import Path

C_DIR = Path(__file__).resolve().parents[1] / "firmware_protocol" / "c"


def test_make_c_test_passes_warning_free_with_sanitizers(tmp_path):
    assert shutil.which("gcc") and shutil.which("make"), "the C reference needs gcc and make"
    build = tmp_path / "build"
    proc = subprocess.run(
        ["make", "-C", str(C_DIR), "test", "lib", f"BUILD={build}"],
        capture_output=True,
        text=True,
        timeout=240,
    )
    out = proc.stdout + proc.stderr
    assert proc.returncode == 0, out
    assert "warning" not in out.lower(), out
    # both the plain and the sanitizer binary read the vectors and report no failure
    lines = [ln for ln in out.splitlines() if ln.endswith("0 failures")]
    assert len(lines) == 2 and all(int(ln.split()[0]) >= 30 for ln in lines), out
