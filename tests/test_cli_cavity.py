"""The commands 'lasecyto sphere', 'lasecyto threshold', 'lasecyto dose' and 'demo --scenario'."""

import pytest

from lasecyto.cli import main
from lasecyto.io import read_table
from lasecyto.safety import CAUTIONS


@pytest.mark.parametrize("command", ["sphere", "threshold", "dose"])
def test_help(command, capsys):
    with pytest.raises(SystemExit) as info:
        main([command, "--help"])
    assert info.value.code == 0
    assert "usage: lasecyto" in capsys.readouterr().out


def test_dose_prints_the_worked_numbers_and_always_the_cautions(capsys):
    # check-values.md section 11 worked numbers: 1 uJ, 5 ns, 20 um top-hat at 470 nm
    assert main(["dose", "--energy-nj", "1000", "--pulse-ns", "5", "--wavelength-nm", "470",
                 "--spot-diameter-um", "20"]) == 0
    out = capsys.readouterr().out
    assert "0.3183 J/cm^2" in out and "6.37e+07 W/cm^2" in out and "2.366e+12" in out
    assert "15.9 x skin MPE" in out and CAUTIONS in out and "laser safety officer" in out
    assert main(["dose", "--energy-nj", "1000", "--pulse-ns", "5", "--wavelength-nm", "470", "--beam",
                 "gaussian", "--w-um", "10", "--warn-fraction", "0.5"]) == 0
    out = capsys.readouterr().out
    assert "0.6366 J/cm^2" in out and out.startswith("WARNING:") and CAUTIONS in out
    assert main(["dose", "--energy-nj", "-1", "--pulse-ns", "5", "--wavelength-nm", "470",
                 "--spot-diameter-um", "20"]) == 1
    captured = capsys.readouterr()
    assert CAUTIONS in captured.out and "--energy-nj: must be positive" in captured.err


@pytest.mark.slow
def test_threshold_command_on_a_lines_table(pump_run, pump_experiment, tmp_path, capsys):
    lines = pump_run.out_dir / "tables" / "lines.parquet"
    side = pump_experiment.parent / "spectra" / "B-01.json"
    code = main(["threshold", str(lines), "--cell", "B-01", "--sidecar", str(side), "--wavelength-nm", "470",
                 "--pulse-ns", "5", "--beam", "gaussian", "--spot-diameter-um", "30", "--instrument-fwhm-nm",
                 "0.12", "--out", str(tmp_path / "thr")])
    out = capsys.readouterr().out
    assert code == 0 and "B-01 mode at" in out and "threshold fluence" in out and CAUTIONS in out
    table = read_table(tmp_path / "thr.parquet", name="thresholds")
    run = pump_run.tables["thresholds"]
    assert table["threshold_nj"].iloc[0] == pytest.approx(run[run["cell_id"] == "B-01"]["threshold_nj"].iloc[0])
    # without the pump energies: a clear error, and the cautions all the same
    assert main(["threshold", str(lines), "--cell", "B-01", "--out", str(tmp_path / "x")]) == 1
    captured = capsys.readouterr()
    assert "pump_energy_nj" in captured.err and CAUTIONS in captured.out


@pytest.mark.slow
def test_sphere_command_on_a_lines_table(sphere_run, tmp_path, capsys):
    lines = sphere_run.out_dir / "tables" / "lines.parquet"
    code = main(["sphere", str(lines), "--cell", "B-03", "--bead-material", "ps-ma", "--diameter-range", "10",
                 "16", "--perturbation-s", "100", "--out", str(tmp_path / "s")])
    out = capsys.readouterr().out
    assert code == 0 and "B-03: " in out and "diameter" in out
    frames = read_table(tmp_path / "s" / "cell_frames.parquet", name="cell_frames")
    run = sphere_run.tables["cell_frames"]
    run = run[run["cell_id"] == "B-03"].reset_index(drop=True)
    assert frames["medium_index"].to_numpy() == pytest.approx(run["medium_index"].to_numpy(), abs=1e-9, nan_ok=True)
    # a tracks table is used with its own track ids
    tracks = sphere_run.out_dir / "tables" / "tracks.csv"
    assert main(["sphere", str(tracks), "--cell", "B-03", "--bead-material", "ps-ma", "--diameter-range", "10",
                 "16", "--out", str(tmp_path / "u")]) == 0
    assert (read_table(tmp_path / "u" / "tracks.parquet", name="tracks")["track_id"].to_numpy()
            == sphere_run.tables["tracks"].query("cell_id == 'B-03'")["track_id"].to_numpy()).all()
    assert main(["sphere", str(lines), "--bead-material", "polystyrene", "--diameter-range", "16", "10",
                 "--out", str(tmp_path / "t")]) == 1
    err = capsys.readouterr().err
    assert "--bead-material: unknown dispersion" in err and "--diameter-range: bad range" in err


@pytest.mark.slow
def test_pump_demo(tmp_path, capfd):
    # the summaries write to the process's standard output: capture the file descriptor
    assert main(["demo", "--scenario", "pump", "--out", str(tmp_path / "demo"), "--no-report"]) == 0
    out = capfd.readouterr().out
    assert "bead lasers" in out and "main-mode thresholds" in out and "(generator:" in out and CAUTIONS in out
    assert "flagged cells" not in out      # a pump series has no verdicts
