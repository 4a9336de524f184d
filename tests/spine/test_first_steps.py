"""A new user's first steps: the README's test command on a machine without torch, the installed package's
demo, and what the commands print before anything else happens."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

REPO = Path(__file__).parents[2]

# A pytest plugin that hides the installed torch, whatever this interpreter has: it refuses any `torch`
# found outside the test tree, and lets through one found inside it (the shadowing this test looks for).
HIDE_TORCH = '''
import importlib.machinery, sys
from pathlib import Path

TESTS = Path({tests!r})


class HideInstalledTorch:
    def find_spec(self, name, path=None, target=None):
        if name != "torch":
            return None
        spec = importlib.machinery.PathFinder.find_spec(name, path)
        places = [spec.origin] if spec and spec.origin else list(spec.submodule_search_locations or []) if spec else []
        if spec is None or not any(Path(p).is_relative_to(TESTS) for p in places):
            raise ModuleNotFoundError("No module named 'torch' (hidden for this test)", name="torch")
        return spec


sys.meta_path.insert(0, HideInstalledTorch())
'''


def test_torch_tests_skip_with_a_reason_when_torch_is_missing(tmp_path: Path) -> None:
    """The README promises the torch tests are skipped without torch: no folder of the test tree may stand
    in for the torch package (a folder without ``__init__.py`` on ``sys.path`` would, as a namespace)."""
    (tmp_path / "hide_torch.py").write_text(HIDE_TORCH.format(tests=str(REPO / "tests")))
    env = {**os.environ, "PYTHONPATH": str(tmp_path)}
    run = subprocess.run([sys.executable, "-m", "pytest", "-p", "hide_torch", "-rs", "-q", "tests/torch"],
                         cwd=REPO, env=env, capture_output=True, text=True, timeout=120)
    # every module skips at import, so pytest collects nothing: exit 5, not 2 (a collection error)
    assert run.returncode == pytest.ExitCode.NO_TESTS_COLLECTED, run.stdout + run.stderr
    skipped = [line for line in run.stdout.splitlines() if line.startswith("SKIPPED")]
    assert len(skipped) == len(list((REPO / "tests" / "torch").glob("test_*.py"))), run.stdout
    assert all("PyTorch is not installed" in line for line in skipped), run.stdout
