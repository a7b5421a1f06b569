"""``lasecyto track``: a lines table in, a tracks table with mode identity out."""

import pandas as pd
import pytest

from lasecyto import tables
from lasecyto.cli import main
from lasecyto.io import read_table, write_table
from lasecyto.synth import mode_trajectories


@pytest.fixture(scope="module")
def lines_csv(tmp_path_factory):
    root = tmp_path_factory.mktemp("track_cli")
    lines = mode_trajectories(n_frames=100, n_hops=2, rng=4, cell_id="cell-a")
    other = mode_trajectories(n_frames=100, n_hops=0, rng=5, cell_id="cell-b")
    both = pd.concat([lines, other], ignore_index=True)
    write_table(both[[c.name for c in tables.SCHEMAS["lines"] if c.name in both.columns]], root / "lines", name="lines")
    return root / "lines.csv"


def test_help(capsys):
    with pytest.raises(SystemExit) as info:
        main(["track", "--help"])
    assert info.value.code == 0 and "LINES_TABLE" in capsys.readouterr().out


def test_track_writes_a_tracks_table(lines_csv, tmp_path, capsys):
    # the generated comb has n_g L = 27.9 um: a 20 um gap keeps the comb search to n_g L in 20-40 um
    # (its Gouy fraction swings around 1/3, where a 3x longer comb would fit the lines as well)
    assert main(["track", str(lines_csv), "--out", str(tmp_path / "tracks"), "--gap-um", "20"]) == 0
    out = capsys.readouterr().out
    assert "cell cell-a:" in out and "cell cell-b:" in out and "tracks.parquet" in out
    tr = read_table(tmp_path / "tracks.parquet", name="tracks")
    assert set(tr["cell_id"]) == {"cell-a", "cell-b"}
    assert tr["hop"].sum() >= 1                       # the hops of cell-a are flagged
    assert (tr["mode_family"] >= 0).all() and (tr["mode_number"] >= -1).all()
    assert read_table(tmp_path / "tracks.csv", name="tracks").shape == tr.shape


def test_track_bad_input(lines_csv, tmp_path, capsys):
    assert main(["track", str(lines_csv), "--out", str(tmp_path / "t"), "--medium", "honey"]) == 1
    assert "--medium: unknown gap medium" in capsys.readouterr().err
    assert main(["track", str(lines_csv), "--out", str(tmp_path / "t"), "--gap-um", "-5"]) == 1
    assert "--gap-um" in capsys.readouterr().err
    assert main(["track", str(tmp_path / "missing.csv"), "--out", str(tmp_path / "t")]) == 1
    assert "table file not found" in capsys.readouterr().err
    bad = tmp_path / "bad.csv"
    bad.write_text("cell_id,frame\nx,0\n")
    assert main(["track", str(bad), "--out", str(tmp_path / "t")]) == 1
    assert "missing columns" in capsys.readouterr().err
