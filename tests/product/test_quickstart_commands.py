"""The README's two quick-start commands are what the Makefile and CI run.

Our own contract (README, "Quick start": `make test` is the README's test
command); no outside source.
"""

from __future__ import annotations

import re
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
TEST_COMMAND = "pytest -n 2 --dist loadgroup"


def _make_recipe(target: str) -> list[str]:
    lines = (ROOT / "Makefile").read_text().splitlines()
    start = next(i for i, line in enumerate(lines) if line.startswith(f"{target}:"))
    recipe = []
    for line in lines[start + 1:]:
        if not line.startswith("\t"):
            break
        recipe.append(line.strip())
    return recipe


def test_the_readme_names_both_quick_start_commands_in_order() -> None:
    readme = (ROOT / "README.md").read_text()
    quick = readme.index("## Quick start")
    assert readme.index("make run", quick) < readme.index("make test", quick)
    assert TEST_COMMAND in readme


def test_make_test_runs_the_readme_test_command() -> None:
    recipe = " ".join(_make_recipe("test"))
    assert re.search(r"\bpython -m " + re.escape(TEST_COMMAND) + r"$", recipe), recipe


def test_make_run_serves_the_demo_on_embedded_sqlite() -> None:
    recipe = " ".join(_make_recipe("run"))
    assert "sqlite:///" in recipe
    assert "keelson demo --serve" in recipe


def test_ci_runs_make_test_in_a_fresh_environment_built_from_the_repository() -> None:
    script = (ROOT / ".ci" / "run").read_text()
    assert "rm -rf .venv" in script
    assert "pip install --quiet -e '.[test]'" in script
    assert "KEELSON_REQUIRE_POSTGRES=1" in script
    assert script.rstrip().endswith("make test")


def test_the_readme_sections_come_in_the_agreed_order() -> None:
    readme = (ROOT / "README.md").read_text()
    headings = ["## Quick start", "## Walk-through with curl", "## Configuration",
                "## Scale-out", "## Benchmarks", "## Cautions"]
    positions = [readme.index(h) for h in headings]
    assert positions == sorted(positions)
