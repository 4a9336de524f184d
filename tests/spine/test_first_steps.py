"""A new user's first steps: the README's test command on a machine without torch, the installed package's
demo, and what the commands print before anything else happens."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import tomllib
import zipfile
from importlib import metadata
from pathlib import Path

import pytest

import watchtower
from agent.cli import main as agent_main
from watchtower import demo
from watchtower.cli import main as cli_main
from watchtower.errors import UsageError

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


def _cli(*args: str, env: dict[str, str] | None = None) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "watchtower.cli", *args], capture_output=True, text=True,
                          timeout=60, env=env, cwd=REPO)


def _flat(text: str) -> str:
    return " ".join(text.split())


def test_both_commands_tell_their_version() -> None:
    with open(REPO / "pyproject.toml", "rb") as f:
        assert tomllib.load(f)["project"]["dynamic"] == ["version"]  # so watchtower.__version__ is the one source
    installed = metadata.version("watchtower-fabric")
    assert installed == watchtower.__version__
    result = _cli("--version")
    assert (result.returncode, result.stdout, result.stderr) == (0, f"watchtower {installed}\n", "")
    agent = subprocess.run([sys.executable, "-m", "agent.cli", "--version"], capture_output=True, text=True,
                           timeout=60, cwd=REPO)
    assert (agent.returncode, agent.stdout, agent.stderr) == (0, f"watchtower-agent {installed}\n", "")


@pytest.mark.parametrize(("argv", "commands"), [
    ([], ["collect", "watch", "replay", "demo", "report", "keys", "relay", "merge"]),
    (["keys"], ["init", "agent"]),
])
def test_a_bare_command_shows_its_help(argv: list[str], commands: list[str],
                                       capsys: pytest.CaptureFixture[str]) -> None:
    assert cli_main(argv) == 2  # nothing was run: a usage miss, but one that shows the way
    out, err = capsys.readouterr()
    assert err == ""
    assert out.startswith(f"usage: watchtower{' ' if argv else ''}{' '.join(argv)}")
    listed = {line.split()[0] for line in out.splitlines() if line.startswith("    ") and line.split()}
    assert set(commands) <= listed, out


def test_a_bare_agent_command_shows_its_help(capsys: pytest.CaptureFixture[str]) -> None:
    assert agent_main([]) == 2
    out, err = capsys.readouterr()
    assert err == "" and out.startswith("usage: watchtower-agent")
    listed = {line.split()[0] for line in out.splitlines() if line.startswith("    ") and line.split()}
    assert {"run", "workload"} <= listed, out


@pytest.mark.parametrize(("option", "default"), [
    ("--rank", None), ("--steps", "10"), ("--layers", "8"), ("--exchange-bytes", "65536"), ("--compute-ms", "5.0"),
    ("--seed", "0"), ("--connect-timeout", "30.0"),
])
def test_workload_options_say_what_they_do_and_their_default(option: str, default: str | None,
                                                             capsys: pytest.CaptureFixture[str]) -> None:
    assert agent_main(["workload", "--help"]) == 0
    help_text = _flat(capsys.readouterr().out.split("options:", 1)[1])
    entry = help_text.split(f" {option} ", 1)[1].split(" --", 1)[0]  # this option's own words
    words = entry.split(maxsplit=1)[1] if entry.split()[0].isupper() else entry  # less its metavar
    assert len(words.split()) >= 4, entry
    if default is not None:
        assert f"(default {default})" in entry, entry


def test_collect_says_where_it_listens_and_records(tmp_path: Path, endpoint: str) -> None:
    env = {**os.environ, "WATCHTOWER_RUN_DIR": str(tmp_path / "run")}
    record = tmp_path / "run.wtrace"
    result = _cli("collect", "--listen", endpoint, "--record", str(record), "--duration", "0.2", env=env)
    assert result.returncode == 0, result.stderr
    assert result.stderr.splitlines() == [
        f"watchtower collect: listening on {endpoint} (loopback), recording to {record}; Ctrl+C stops"]


def _wheel(tmp_path: Path) -> Path:
    """Build the wheel a plain ``pip install .`` would install, from a copy of the tree (no build/ left)."""
    source = tmp_path / "source"
    source.mkdir()
    for name in ("pyproject.toml", "README.md"):
        shutil.copy2(REPO / name, source / name)
    for name in ("agent", "watchtower"):
        shutil.copytree(REPO / name, source / name, ignore=shutil.ignore_patterns("__pycache__"))
    run = subprocess.run([sys.executable, "-m", "pip", "wheel", "-q", "--no-deps", "-w", str(tmp_path / "dist"),
                          str(source)], capture_output=True, text=True, timeout=300)
    assert run.returncode == 0, run.stderr
    (wheel,) = (tmp_path / "dist").glob("*.whl")
    return wheel


def test_an_installed_package_runs_its_demo_from_any_folder(tmp_path: Path) -> None:
    """``pip install .`` (not editable) must carry what ``watchtower demo`` reads; here the wheel is unpacked
    beside nothing else and the demo's feed is opened from another folder (the console itself is not run)."""
    site = tmp_path / "site"
    with zipfile.ZipFile(_wheel(tmp_path)) as wheel:
        wheel.extractall(site)
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    probe = ("import watchtower.demo as d\n"
             "def show(feed):\n"
             "    print(d.__file__); print(feed.last_step); print(feed.where); return 0\n"
             "raise SystemExit(d.run_demo(live=False, speed=1.0, ranks=4, window=120, run_console=show))\n")
    env = {**os.environ, "PYTHONPATH": str(site)}
    run = subprocess.run([sys.executable, "-c", probe], cwd=elsewhere, env=env, capture_output=True, text=True,
                         timeout=120)
    assert run.returncode == 0, run.stderr
    module, last_step, where = run.stdout.splitlines()
    assert Path(module).is_relative_to(site)  # the unpacked wheel's copy, not the source tree
    assert int(last_step) > 0
    assert where == "the bundled demo"  # the header names it so, not by a path inside site-packages


def test_a_missing_demo_recording_says_how_to_get_it_back(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(demo, "DEMO_RECORDING", tmp_path / "gone.wtrace.gz")
    with pytest.raises(UsageError) as caught:
        demo.run_demo(live=False, speed=1.0, ranks=4, window=120, run_console=lambda feed: 0)
    assert "reinstall" in str(caught.value) and "pip install --force-reinstall watchtower-fabric" in str(caught.value)
