"""Mutation check of the analysis: does some test fail when a threshold, fit or rule is subtly wrong?

Each mutant is one textual edit of one file under ``watchtower/analysis/``. The worktree is copied once to
a temporary folder (the real source is never touched); for each mutant the copy's file is edited, the
analysis tests run there (``pytest -x``, so a killed mutant stops at its first failing test) and the file
is put back. The table at the end says which mutants some test killed and which survived.

    python dev/mutants.py            # all mutants
    python dev/mutants.py -k LIMITS -k SHADOW  # only mutants whose name contains one of these

Exit status 1 when a mutant survived (or the unmutated copy fails its tests). It takes a few minutes and
loads both cores: on a shared machine run it under the shared lock (see DEVELOPERS.md).
"""

from __future__ import annotations

import argparse
import os
import re
import shutil
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass
from fractions import Fraction
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
ANALYSIS = "watchtower/analysis"
# The boundary tests first, so most mutants fail fast; then the rest of the analysis tests.
FIRST = ["test_thresholds.py", "test_sharing.py", "test_links.py"]
TESTS = [f"tests/analysis/{name}" for name in FIRST] + sorted(
    f"tests/analysis/{p.name}" for p in (REPO / "tests/analysis").glob("test_*.py") if p.name not in FIRST)


@dataclass(frozen=True)
class Mutant:
    name: str
    file: str  # relative to watchtower/analysis/
    old: str  # must occur exactly once in the file
    new: str


# The mutants of issue 15's audit, each a plausible slip that once went unnoticed by every test.
AUDIT = [
    Mutant("comm-bound 0.5 -> 0.4", "aggregate.py", "COMM_BOUND_THRESHOLD = 0.5", "COMM_BOUND_THRESHOLD = 0.4"),
    Mutant("comm-bound 0.5 -> 0.7", "aggregate.py", "COMM_BOUND_THRESHOLD = 0.5", "COMM_BOUND_THRESHOLD = 0.7"),
    Mutant("comm-bound > -> >=", "aggregate.py", "nan=0.0) > threshold", "nan=0.0) >= threshold"),
    Mutant("outlier z 3.5 -> 3.0", "efficiency.py", "OUTLIER_Z = 3.5", "OUTLIER_Z = 3.0"),
    Mutant("outlier z 3.5 -> 5.0", "efficiency.py", "OUTLIER_Z = 3.5", "OUTLIER_Z = 5.0"),
    Mutant("SLOW_FRACTION 0.5 -> 0.45", "links.py", "SLOW_FRACTION = 0.5", "SLOW_FRACTION = 0.45"),
    Mutant("FAR_BELOW_PEERS 1/3 -> 1/5", "efficiency.py", "FAR_BELOW_PEERS = 1 / 3", "FAR_BELOW_PEERS = 1 / 5"),
    Mutant("ports LIMITS 0.75 -> 0.95", "ports.py", "LIMITS = 0.75", "LIMITS = 0.95"),
    Mutant("ports SHADOW 3 -> 1.5", "ports.py", "SHADOW = 3.0", "SHADOW = 1.5"),
    Mutant("below-nominal without its size guard", "links.py", "below = (sizes >= 2) & (", "below = ("),
    Mutant("far-below rule on classes of two", "links.py", "(class_size >= 3)", "(class_size >= 2)"),
    Mutant("Hockney weights count/t^2 -> count/t", "robust.py", "weight = counts / bin_t**2",
           "weight = counts / bin_t"),
    Mutant("Hockney negative intercept -> abs", "robust.py", "np.maximum(a[fitted], 0.0)", "np.abs(a[fitted])"),
    Mutant("Hockney size bins per decade", "robust.py", "np.floor(np.log2(n) * bins_per_octave)",
           "np.floor(np.log10(n) * bins_per_octave)"),
    Mutant("CUSUM alarm > h -> >= h", "cusum.py", "alarm < 0 and c > limit", "alarm < 0 and c >= limit"),
    Mutant("CUSUM warm-up sigma without 1.4826", "cusum.py", "sigma = max(MAD_TO_SIGMA * float(",
           "sigma = max(1.0 * float("),
]

# Every other threshold of the analysis (the CUSUM's are issue 14's), scaled by 0.7 and by 1.3.
SCALED = [
    ("aggregate.py", "COMM_BOUND_THRESHOLD = {}", "0.5"),
    ("efficiency.py", "OUTLIER_Z = {}", "3.5"),
    ("efficiency.py", "RELATIVE_JITTER = {}", "0.02"),
    ("efficiency.py", "FAR_BELOW_PEERS = {}", "1 / 3"),
    ("robust.py", "Z_CONSISTENCY = {}", "0.6745"),
    ("robust.py", "MEAN_AD_CONSISTENCY = {}", "1.253314"),
    ("robust.py", "quantile: float = {}, bins_per_octave", "0.25"),
    ("robust.py", "bins_per_octave: int = {})", "8"),
    ("links.py", "SLOW_FRACTION = {}", "0.5"),
    ("links.py", "WAITS_UNKNOWN_QUANTILE = {}", "0.25"),
    ("links.py", "WAITS_KNOWN_QUANTILE = {}", "0.5"),
    ("links.py", "MAX_FIT_TRANSFERS = {}", "200_000"),
    ("links.py", "(class_size >= {})", "3"),
    ("ports.py", "SHADOW = {}", "3.0"),
    ("ports.py", "LIMITS = {}", "0.75"),
    ("ports.py", "NIC_MARGIN = {}", "0.1"),
    ("ports.py", "if len(members) >= {}:", "3"),
    ("sharing.py", "SATURATED = {}", "0.6"),
    ("sharing.py", "FAIR = {}", "0.6"),
    ("sharing.py", "BUSY_QUANTILE = {}", "0.9"),
    ("sharing.py", "BINS_PER_OCTAVE = {}", "16"),
    ("sharing.py", "OVER_NOMINAL = {}", "1.1"),
    ("summary.py", "RECENT_STEPS = {}", "50"),
]
INTEGER = re.compile(r"^[0-9_]+$")


def scaled_mutants() -> list[Mutant]:
    out = []
    for file, pattern, value in SCALED:
        base = float(Fraction(value.replace(" ", "").replace("_", "")))
        for factor in (0.7, 1.3):
            new = round(base * factor) if INTEGER.match(value) else repr(round(base * factor, 10))
            out.append(Mutant(f"{pattern.format(value)} x{factor}", file, pattern.format(value),
                              pattern.format(new)))
    return out


def run_tests(root: Path) -> tuple[bool, str]:
    """Run the analysis tests in the copy; (passed, first failing test or the tail of the output)."""
    env = {**os.environ, "PYTHONPATH": str(root), "PYTHONDONTWRITEBYTECODE": "1"}
    args = [sys.executable, "-m", "pytest", *TESTS, "-x", "-q", "-p", "no:cacheprovider"]
    proc = subprocess.run(args, cwd=root, env=env, capture_output=True, text=True, check=False)
    failed = re.findall(r"^FAILED (\S+)", proc.stdout, re.MULTILINE)
    detail = failed[0] if failed else (proc.stdout.strip().splitlines() or ["(no output)"])[-1]
    return proc.returncode == 0, detail


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("-k", action="append", default=[], help="only mutants whose name contains this (repeatable)")
    args = parser.parse_args()
    mutants = [m for m in AUDIT + scaled_mutants() if not args.k or any(k in m.name for k in args.k)]
    with tempfile.TemporaryDirectory(prefix="wt-mutants-") as tmp:
        root = Path(tmp) / "repo"
        shutil.copytree(REPO, root, ignore=shutil.ignore_patterns(".venv", ".git", "__pycache__", "*.egg-info",
                                                                  ".pytest_cache", ".ruff_cache"))
        check = subprocess.run([sys.executable, "-c", "import watchtower; print(watchtower.__file__)"], cwd=root,
                               env={**os.environ, "PYTHONPATH": str(root)}, capture_output=True, text=True,
                               check=True)
        if not check.stdout.startswith(str(root)):
            print(f"the copy does not import its own source: {check.stdout.strip()}", file=sys.stderr)
            return 2
        ok, detail = run_tests(root)
        if not ok:
            print(f"the unmutated copy fails its tests: {detail}", file=sys.stderr)
            return 1
        rows, survived = [], 0
        for m in mutants:
            path = root / ANALYSIS / m.file
            original = path.read_text(encoding="utf-8")
            if original.count(m.old) != 1:
                print(f"{m.name}: {m.old!r} occurs {original.count(m.old)} times in {m.file}", file=sys.stderr)
                return 2
            began = time.monotonic()
            try:
                path.write_text(original.replace(m.old, m.new), encoding="utf-8")
                ok, detail = run_tests(root)
            finally:
                path.write_text(original, encoding="utf-8")
            survived += ok
            rows.append((m.name, "SURVIVED" if ok else "killed", "" if ok else detail, time.monotonic() - began))
            print(f"{rows[-1][1]:8}  {m.name}  {rows[-1][2]}", flush=True)
    width = max(len(r[0]) for r in rows)
    print(f"\n{'mutant':{width}}  result    by (first failing test)")
    for name, result, by, _ in rows:
        print(f"{name:{width}}  {result:8}  {by}")
    print(f"\n{len(rows) - survived} of {len(rows)} mutants killed, {survived} survived")
    return 1 if survived else 0


if __name__ == "__main__":
    sys.exit(main())
