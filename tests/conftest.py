"""Shared fixtures: synthetic experiments made by lasecyto.synth (ground truth beside them)."""

import pytest


@pytest.fixture(scope="session")
def fp_experiment(tmp_path_factory):
    """The default synthetic Fabry-Perot experiment (the same as the demo's)."""
    from lasecyto.synth import write_fp_experiment

    root = tmp_path_factory.mktemp("fp_experiment")
    return write_fp_experiment(root / "experiment", rng=7)


@pytest.fixture(scope="session")
def fp_run(fp_experiment, tmp_path_factory):
    """The pipeline run over :func:`fp_experiment` (two worker processes, as the demo runs)."""
    from lasecyto.pipeline import run_experiment

    out = tmp_path_factory.mktemp("fp_run")
    return run_experiment(fp_experiment, out, workers=2, show_progress=False)


@pytest.fixture(scope="session")
def small_experiment(tmp_path_factory):
    """A small experiment for tests of the batch machinery (2 dishes x 3 cells, 40 frames)."""
    from lasecyto.synth import write_fp_experiment

    root = tmp_path_factory.mktemp("small_experiment")
    return write_fp_experiment(root / "experiment", n_dishes=2, cells_per_dish=3, n_frames=40,
                               perturbation_s=150.0, imaging_dish=False, rng=11)
