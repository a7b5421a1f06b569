"""Copy the user-facing recipes in ``pipelines/`` into the package (``lasecyto/pipeline/recipes/``).

``pipelines/`` is the copy people read and edit; the package holds the same
files so that built-in recipes are found after a non-editable install.  Run
from the repository root after adding or changing a recipe:
``.venv/bin/python tools/sync_recipes.py`` (a test fails while the two differ).
"""

import shutil
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
SOURCE = ROOT / "pipelines"
TARGET = ROOT / "lasecyto" / "pipeline" / "recipes"


def main():
    TARGET.mkdir(exist_ok=True)
    wanted = {p.name for p in SOURCE.glob("*.toml")}
    for old in TARGET.glob("*.toml"):
        if old.name not in wanted:
            old.unlink()
            print(f"removed {old.relative_to(ROOT)}")
    for src in sorted(SOURCE.glob("*.toml")):
        dst = TARGET / src.name
        if not dst.is_file() or dst.read_bytes() != src.read_bytes():
            shutil.copyfile(src, dst)
            print(f"copied {src.relative_to(ROOT)} -> {dst.relative_to(ROOT)}")


if __name__ == "__main__":
    main()
