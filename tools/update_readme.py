"""Rewrite the generated sections of README.md (table schemas, verdict rule).

Run from the repository root: ``.venv/bin/python tools/update_readme.py``.
"""

import re
import textwrap
from pathlib import Path

from lasecyto import tables
from lasecyto.features import CHANGE_RULE

TITLES = {
    "lines": "`lines`: one row per fitted line per frame per cell",
    "tracks": "`tracks`: the lasing lines that were linked into mode tracks (plus `comb_index`)",
    "cell_frames": "`cell_frames`: one row per cell and frame",
    "cells": "`cells`: one row per cell (plus `quantity`, the series judged, `note`, `pattern_note`, "
             "`features_note` and the feature catalogue of docs/features.md)",
    "patterns": "`patterns`: one row per emission-image region per frame (runs with images; "
                "`lasecyto patterns`)",
    "predictions": "`predictions`: one row per cell from `lasecyto classify apply` (plus `p_<class>` per class)",
    "thresholds": "`thresholds`: pump series only, one row per cell and mode fitted",
}


def replace(text, tag, body):
    pattern = re.compile(rf"(<!-- {tag}:start -->\n).*?(<!-- {tag}:end -->)", re.S)
    return pattern.sub(lambda m: m.group(1) + body + m.group(2), text)


def main():
    path = Path(__file__).resolve().parents[1] / "README.md"
    text = path.read_text()
    parts = []
    for name in TITLES:
        schema = tables.describe(name)
        if name == "tracks":
            n_lines = len(tables.SCHEMAS["lines"])
            rows = schema.splitlines()
            schema = "\n".join(rows[:2] + ["| *all `lines` columns* | | | |"] + rows[2 + n_lines:])
        parts.append(f"#### {TITLES[name]}\n\n{schema}\n")
    text = replace(text, "tables", "\n".join(parts))
    rule = "\n".join(textwrap.wrap(" ".join(CHANGE_RULE.split()), 96, break_on_hyphens=False))
    text = replace(text, "rule", rule + "\n")
    path.write_text(text)


if __name__ == "__main__":
    main()
