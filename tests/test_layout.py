"""The layout holds: layers import only downwards, modules stay small, and the
service's root holds only what belongs to no part.

Layers, lowest first: engine <- config, errors, process, text <- store <- versions
<- usecases <- web <- worker <- tools. A module may import its own layer and
any below it; ``service/__main__`` and ``tools`` may import anything. Imports
inside functions count too (a lazy import is still a dependency).
"""

from __future__ import annotations

import ast
from collections.abc import Iterator
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
ENGINE, SERVICE = ROOT / "engine", ROOT / "service"
LAYERS = {
    "service.config": 1, "service.errors": 1, "service.process": 1, "service.text": 1,
    "service.store": 2,
    "service.versions": 3,
    "service.usecases": 4,
    "service.web": 5,
    "service.worker": 6,
    "service.tools": 7,
    "service.__main__": 8,
}
MAX_LINES = 400
SERVICE_ROOT_MODULES = {"__init__", "__main__", "config", "errors", "process", "text"}
SERVICE_PARTS = {"store", "versions", "usecases", "web", "worker", "tools"}


def modules(folder: Path) -> Iterator[tuple[str, Path]]:
    for path in sorted(folder.rglob("*.py")):
        parts = path.relative_to(ROOT).with_suffix("").parts
        name = ".".join(parts[:-1] if parts[-1] == "__init__" else parts)
        yield name, path


def imported(name: str, path: Path) -> Iterator[tuple[int, str]]:
    """(line, module) of every import in the file, relative ones resolved."""
    package = name if path.name == "__init__.py" else name.rpartition(".")[0]
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            for alias in node.names:
                yield node.lineno, alias.name
        elif isinstance(node, ast.ImportFrom):
            base = node.module or ""
            if node.level:
                anchor = package.split(".")
                anchor = anchor[:len(anchor) - node.level + 1]
                base = ".".join([*anchor, base] if base else anchor)
            yield node.lineno, base
            for alias in node.names:  # "from service import web" imports service.web
                yield node.lineno, f"{base}.{alias.name}"


def layer(module: str) -> int | None:
    for prefix, rank in LAYERS.items():
        if module == prefix or module.startswith(prefix + "."):
            return rank
    return None


def test_the_engine_imports_nothing_of_the_service() -> None:
    found = [(str(path.relative_to(ROOT)), line, target)
             for name, path in modules(ENGINE)
             for line, target in imported(name, path)
             if target == "service" or target.startswith("service.")]
    assert found == []


def test_service_layers_import_only_their_own_layer_and_below() -> None:
    upward = []
    for name, path in modules(SERVICE):
        rank = layer(name)
        if rank is None or name.startswith(("service.tools", "service.__main__")):
            continue
        for line, target in imported(name, path):
            target_rank = layer(target)
            if target_rank is not None and target_rank > rank:
                upward.append(f"{path.relative_to(ROOT)}:{line} imports {target}")
    assert upward == []


def test_every_service_module_belongs_to_a_layer() -> None:
    assert [name for name, _ in modules(SERVICE) if name != "service" and layer(name) is None] \
        == []


def test_no_module_is_over_400_lines() -> None:
    long = []
    for folder in (ENGINE, SERVICE):
        for _, path in modules(folder):
            count = len(path.read_text(encoding="utf-8").splitlines())
            if count > MAX_LINES:
                long.append(f"{path.relative_to(ROOT)}: {count} lines")
    assert long == []


def test_the_service_root_holds_only_what_belongs_to_no_part() -> None:
    files = {path.stem for path in SERVICE.glob("*.py")}
    folders = {path.name for path in SERVICE.iterdir()
               if path.is_dir() and (path / "__init__.py").exists()}
    assert files == SERVICE_ROOT_MODULES
    assert folders == SERVICE_PARTS


def test_the_checks_see_an_upward_import() -> None:
    """The import reader resolves the forms the checks rely on."""
    sample = ROOT / "service" / "usecases" / "records.py"
    targets = {target for _, target in imported("service.usecases.records", sample)}
    assert "service.store.tables" in targets and layer("service.store.tables") == 2
    assert layer("service.web.schemas.rules") == 5 > layer("service.usecases.records") == 4
