"""The README documents the current table schemas and verdict rule."""

from pathlib import Path

import pytest

from lasecyto import tables

README = Path(__file__).resolve().parents[1] / "README.md"


def _section(text, tag):
    start, end = f"<!-- {tag}:start -->", f"<!-- {tag}:end -->"
    return text[text.index(start) + len(start):text.index(end)]


@pytest.mark.parametrize("name", sorted(tables.SCHEMAS))
def test_readme_lists_every_column(name):
    section = _section(README.read_text(), "tables")
    for row in tables.describe(name).splitlines()[2:]:
        assert row in section, f"README is out of date for '{name}': run tools/update_readme.py"


def test_readme_states_the_verdict_rule():
    from lasecyto.features import CHANGE_RULE

    section = _section(README.read_text(), "rule")
    assert " ".join(CHANGE_RULE.split()) in " ".join(section.split())


def test_readme_opens_with_the_job():
    head = README.read_text()[:1500].lower()
    assert "cell" in head and "laser" in head
