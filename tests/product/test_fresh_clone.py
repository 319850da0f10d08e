"""The README's two commands on a fresh clone of what is committed.

A fresh clone has only committed files, so a module or migration someone
forgot to add breaks here first. The virtual environment itself is not rebuilt
(CI's .ci/run does that on every run: a fresh .venv, then `make test`); the
clone runs with this interpreter and its installed dependencies.
Our own contract (README, "Quick start"); no outside source.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from tests.product.servers import ROOT

# One xdist worker runs the lot (--dist loadgroup), so the clone is made once.
pytestmark = [pytest.mark.slow, pytest.mark.xdist_group("fresh_clone")]


@pytest.fixture(scope="module")
def clone(tmp_path_factory: pytest.TempPathFactory) -> Path:
    if shutil.which("git") is None or not (ROOT / ".git").exists():
        pytest.fail("these checks need git and a git checkout of the repository")
    target = tmp_path_factory.mktemp("fresh") / "keelson"
    subprocess.run(["git", "clone", "--quiet", str(ROOT), str(target)], check=True,
                   timeout=120)
    return target


def _env(clone: Path) -> dict[str, str]:
    # The clone's code first on the path, ahead of the editable install of ROOT.
    env = {k: v for k, v in os.environ.items() if not k.startswith("KEELSON_")}
    env["PYTHONPATH"] = str(clone)
    return env


def test_make_knows_both_commands_in_the_clone(clone: Path) -> None:
    for target, expected in (("test", "pytest -n 2 --dist loadgroup"),
                             ("run", "keelson demo --serve")):
        done = subprocess.run(["make", "-n", target], cwd=clone, capture_output=True,
                              text=True, timeout=60, check=False)
        assert done.returncode == 0, done.stderr
        assert expected in done.stdout


def test_the_clone_collects_the_whole_suite_without_errors(clone: Path) -> None:
    done = subprocess.run([sys.executable, "-m", "pytest", "--collect-only", "-q", "-p",
                           "no:cacheprovider"], cwd=clone, env=_env(clone),
                          capture_output=True, text=True, timeout=300, check=False)
    assert done.returncode == 0, done.stdout[-3000:] + done.stderr[-3000:]
    assert " tests collected" in done.stdout or " test collected" in done.stdout


def test_the_clone_runs_the_demo_on_embedded_sqlite(clone: Path, tmp_path: Path) -> None:
    env = _env(clone) | {"KEELSON_DATABASE_URL": f"sqlite:///{tmp_path}/demo.db"}
    done = subprocess.run([sys.executable, "-m", "service", "demo", "--records", "300",
                           "--no-retrain"], cwd=clone, env=env, capture_output=True,
                          text=True, timeout=300, check=False)
    assert done.returncode == 0, done.stdout[-3000:] + done.stderr[-3000:]
    assert "Cautions" in done.stdout
    # The clone's own code ran, not the working tree's.
    probe = subprocess.run([sys.executable, "-c", "import service; print(service.__file__)"],
                           cwd=clone, env=env, capture_output=True, text=True, check=True)
    assert probe.stdout.strip().startswith(str(clone))
