"""The README's configuration table and the registry of settings
(service/config.py) say the same thing, and the code reads no setting the
registry does not know.

Our own contract (docs/architecture.md, "Settings"); no outside source.
"""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from service.config import SETTINGS, ConfigError, render

ROOT = Path(__file__).resolve().parents[1]
COLUMNS = ["variable", "read by", "meaning", "default"]


def readme_table() -> list[list[str]]:
    """The rows of the one table in the README's "## Configuration" section."""
    readme = (ROOT / "README.md").read_text()
    start = readme.index("\n## Configuration\n")
    end = readme.index("\n## ", start + 1)
    lines = [line for line in readme[start:end].splitlines() if line.startswith("|")]
    rows = [[cell.strip() for cell in line.strip().strip("|").split("|")] for line in lines]
    header, rule, *body = rows
    assert header == COLUMNS
    assert all(set(cell) <= set("-: ") for cell in rule)
    blocks = re.findall(r"(?:^\|.*\n)+", readme[start:end], flags=re.MULTILINE)
    assert len(blocks) == 1, "the section holds exactly one table"
    return body


def test_the_readme_lists_exactly_the_registry_in_its_order() -> None:
    names = [row[0] for row in readme_table()]
    assert names == [f"`{setting.name}`" for setting in SETTINGS]


@pytest.mark.parametrize("setting", SETTINGS, ids=lambda s: s.name)
def test_each_row_says_what_the_registry_says(setting) -> None:  # type: ignore[no-untyped-def]
    row = next(row for row in readme_table() if row[0] == f"`{setting.name}`")
    assert row[1:] == [setting.read_by, setting.meaning, setting.default_text]


@pytest.mark.parametrize("setting", SETTINGS, ids=lambda s: s.name)
def test_a_default_as_shown_reads_back_as_the_default(setting) -> None:  # type: ignore[no-untyped-def]
    """What the table shows is what one would write in the environment."""
    if setting.shown is not None:  # worked out at start: shown in words
        assert setting.default is None and setting.shown != render(None)
        return
    if setting.default is None:
        assert setting.default_text == "unset"
        assert setting.value(None) is None and setting.value("") is None
        return
    spelled = setting.default_text.strip("`")
    assert setting.value(spelled) == setting.default
    assert setting.value(None) == setting.default


@pytest.mark.parametrize("setting", [s for s in SETTINGS if s.parse.__name__ != "text"],
                         ids=lambda s: s.name)
def test_a_value_the_parser_cannot_read_names_the_setting(setting) -> None:  # type: ignore[no-untyped-def]
    bad = "not-a-number" if setting.parse.__name__ != "on_unless_off" else None
    if bad is None:  # "off only for 0, false, no": every other text reads as on
        assert setting.value("off") is True and setting.value("no") is False
        return
    with pytest.raises(ConfigError, match=setting.name):
        setting.value(bad)


NAME = r"KEELSON_[A-Z0-9_]*[A-Z0-9]|PROMETHEUS_MULTIPROC_DIR|FORWARDED_ALLOW_IPS"
SETTING_NAME = re.compile(rf"\b({NAME})\b")
# Reading a variable straight from an environment mapping: os.environ.get("X"),
# env.get("X"), os.environ["X"] (an assignment writes, it does not read).
DIRECT_READ = re.compile(
    rf"""(?:environ|env)(?:\.get\(|\[)\s*["']({NAME})["']\s*(?:[,)]|\](?!\s*=))""")


def _code() -> list[Path]:
    return sorted([*ROOT.glob("service/**/*.py"), *ROOT.glob("migrations/**/*.py")])


def test_every_setting_the_code_names_is_in_the_registry() -> None:
    known = {setting.name for setting in SETTINGS}
    named = {name for path in _code() if path.name != "config.py"
             for name in SETTING_NAME.findall(path.read_text())}
    assert named - known == set(), "named in the code, missing from the registry"
    assert known - named == set(), "registered, but no module outside the registry uses it"


def test_no_module_reads_a_setting_around_the_registry() -> None:
    readers = {str(path.relative_to(ROOT)): DIRECT_READ.findall(path.read_text())
               for path in _code() if path.name != "config.py"}
    assert {path: names for path, names in readers.items() if names} == {}
