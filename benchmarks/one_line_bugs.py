"""The one-line bugs an audit once slipped past the tests, applied again to a copy of the tree:
each must now fail the named tests. Not part of CI (a few minutes); run it after touching the
crossing watch, the assembler or the stray search. Runs pytest in one process (``-n 0``): under
xdist a stopped run exits 2, which is no proof a test failed.

    python3 benchmarks/one_line_bugs.py
"""

from __future__ import annotations

import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

#: (what, file, original text, bug, tests that must fail)
BUGS = [
    ("the crossing band alone widened 2x", "monitor/crossing.py",
     "    return zeta * f_n + 0.5 * bin_hz + u * f_n\n", "    return 2 * (zeta * f_n + 0.5 * bin_hz + u * f_n)\n",
     ["tests/test_crossing_watch.py::test_the_module_bands_are_the_documented_ones",
      "tests/test_crossing_watch.py::test_every_passage_is_nearing_then_crossing_inside_the_band_in_at_most_four_events"]),
    ("the band-exit hysteresis set to 1.0", "monitor/crossing.py",
     "EXIT_MARGIN = 1.15", "EXIT_MARGIN = 1.0",
     ["tests/test_crossing_watch.py::test_every_passage_is_nearing_then_crossing_inside_the_band_in_at_most_four_events"]),
    ("the sample sequence not carried across reads", "monitor/assembler.py",
     "        self._expect_seq = int((seq[-1] + counts[-1]) % U32)\n", "        self._expect_seq = None\n",
     ["tests/test_assembler.py::test_a_loss_right_at_a_read_boundary_is_counted",
      "tests/test_assembler.py::test_samples_lost_between_reads_are_counted_exactly"]),
    ("the stray search's 'speed must change' rule removed", "monitor/stray.py",
     "        return (hi - lo) / hi >= need\n", "        return True\n",
     ["tests/test_stray.py::test_synthetic_peak_with_the_speed_held_is_not_stray"]),
]


def main() -> int:
    missed = 0
    for what, rel, old, bug, tests in BUGS:
        with tempfile.TemporaryDirectory() as tmp:
            dst = Path(tmp) / "tree"
            shutil.copytree(ROOT, dst, ignore=shutil.ignore_patterns("mutants", ".git", "__pycache__", "*.egg-info"))
            f = dst / rel
            text = f.read_text()
            if text.count(old) != 1:
                print(f"{what}: the original line is not in {rel} once; update this script")
                missed += 1
                continue
            f.write_text(text.replace(old, bug))
            for t in tests:
                p = subprocess.run([sys.executable, "-m", "pytest", "-q", "-n", "0", "-p", "no:cacheprovider", t],
                                   cwd=dst, capture_output=True, text=True)
                caught = p.returncode == 1  # tests failed (2 would be an interrupted or broken run)
                missed += not caught
                print(f"{'caught' if caught else 'MISSED'}: {what} -- {t.split('::')[1]}")
    return 1 if missed else 0


if __name__ == "__main__":
    raise SystemExit(main())
