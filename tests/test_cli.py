import io

import pytest

from lasecyto import __version__
from lasecyto.cli import _summary, main


def test_version(capsys):
    with pytest.raises(SystemExit) as info:
        main(["--version"])
    assert info.value.code == 0
    assert __version__ in capsys.readouterr().out


@pytest.mark.parametrize("command", [[], ["run"], ["demo"], ["report"], ["lines"], ["patterns"], ["classify"],
                                     ["classify", "train"], ["classify", "apply"]])
def test_help_of_every_command(command, capsys):
    with pytest.raises(SystemExit) as info:
        main(command + ["--help"])
    assert info.value.code == 0
    assert "usage: lasecyto" in capsys.readouterr().out


def test_no_command_prints_help_and_usage_status(capsys):
    assert main([]) == 2
    assert "COMMAND" in capsys.readouterr().out


@pytest.mark.slow
def test_summary_lists_tables_and_flagged_cells(fp_run):
    buf = io.StringIO()
    _summary(fp_run, out=buf)
    text = buf.getvalue()
    assert "run_record.json" in text
    assert "flagged cells by condition" in text
    for condition in fp_run.tables["cells"]["condition"].unique():
        assert condition in text


@pytest.mark.slow
def test_report_command_rewrites_the_report(fp_run, capsys):
    (fp_run.out_dir / "report.html").unlink()
    assert main(["report", str(fp_run.out_dir)]) == 0
    assert (fp_run.out_dir / "report.html").is_file()
