"""The README stays true: its tables are the code's tables, and Quick start has exactly two commands
(regression of documentation against the code; common practice)."""

from __future__ import annotations

import re
from pathlib import Path

from audit.columns import RESULT_COLUMNS, markdown_table
from audit.inventory import inventory_columns_markdown
from audit.ranges import ranges_markdown

ROOT = Path(__file__).resolve().parents[2]
README = (ROOT / "README.md").read_text(encoding="utf-8")


def _block(name: str) -> str:
    m = re.search(rf"<!-- {name}:start -->\n(.*?)<!-- {name}:end -->", README, re.S)
    assert m, name
    return m.group(1).strip()


def test_inventory_columns_table_is_current():
    assert _block("inventory-columns") == inventory_columns_markdown().strip()


def test_ranges_table_is_current():
    assert _block("ranges") == ranges_markdown().strip()


def test_results_columns_table_is_current():
    assert _block("results-columns") == markdown_table().strip()
    for c in RESULT_COLUMNS:
        assert f"`{c.name}`" in README


def test_quick_start_has_exactly_two_commands():
    m = re.search(r"## Quick start\n\n```\n(.*?)```", README, re.S)
    assert m and m.group(1).split("\n")[:-1] == ["make demo", "make test"]


def test_caution_is_in_the_readme():
    for words in ("advisory", "management-of-change", "safety instrumented functions", "licensed"):
        assert words in README
