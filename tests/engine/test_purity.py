"""engine/ stays pure: no web or database libraries, no I/O modules, deterministic."""

from __future__ import annotations

import ast
import json
import pathlib
import subprocess
import sys

import engine

ENGINE = pathlib.Path(engine.__file__).parent
# Standard-library modules that reach the outside world, the clock or global random state.
FORBIDDEN_STDLIB = {"os", "sys", "subprocess", "socket", "pathlib", "shutil", "tempfile",
                    "pickle", "shelve", "random", "time", "datetime", "logging", "threading",
                    "multiprocessing", "urllib", "http", "sqlite3", "glob", "signal", "ctypes"}


def test_importing_engine_loads_neither_flask_nor_sqlalchemy():
    """docs/architecture.md, invariant 7: the pure core, held by a subprocess import check."""
    code = ("import sys, json, engine; "
            "print(json.dumps(sorted(m for m in sys.modules "
            "if m.split('.')[0] in ('flask', 'sqlalchemy', 'werkzeug', 'marshmallow'))))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True, cwd=ENGINE.parent, timeout=60)
    assert json.loads(out.stdout) == []


def test_engine_modules_import_only_numpy_and_side_effect_free_standard_modules():
    for path in ENGINE.glob("*.py"):
        tree = ast.parse(path.read_text())
        for node in ast.walk(tree):
            if isinstance(node, ast.Import):
                names = [alias.name for alias in node.names]
            elif isinstance(node, ast.ImportFrom):
                names = [node.module or "engine"] if node.level == 0 else ["engine"]
            else:
                continue
            for name in names:
                top = name.split(".")[0]
                allowed = top in ("numpy", "engine") or (
                    top in sys.stdlib_module_names and top not in FORBIDDEN_STDLIB)
                assert allowed, f"{path.name} imports {name}"


def test_engine_reads_no_environment_and_opens_no_files():
    for path in ENGINE.glob("*.py"):
        source = path.read_text()
        for forbidden in ("os.environ", "getenv", "open(", "np.random.seed",
                          "np.random.rand", "default_rng()"):
            assert forbidden not in source, f"{path.name} uses {forbidden}"
