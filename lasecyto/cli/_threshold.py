"""``lasecyto threshold``: laser threshold, beta and slope efficiency from a pump series."""

from __future__ import annotations

from pathlib import Path

from ._common import EXIT_ERROR, EXIT_OK
from ._inputs import Problems, add_stack_options, frame_times, load_lines


def register(sub):
    p = sub.add_parser(
        "threshold", help="threshold, beta and slope efficiency of each main mode of a pump series",
        description="Fit the single-mode rate-equation S-curve to the output of the main modes of a pump "
                    "series (one pump energy per frame, from the sidecar's pump_energy_nj; per-frame "
                    "exposures from frame_exposure_s) and write the thresholds table (Parquet and CSV). "
                    "The input is a pump-series stack or its lines table (then --sidecar gives the pump "
                    "energies). Pump-safety cautions are always printed.")
    p.add_argument("input", type=Path, help="pump-series stack, or its lines table (.parquet, .csv)")
    p.add_argument("--wavelength-nm", type=float, default=None, metavar="NM",
                   help="pump wavelength (with --pulse-ns and --spot-diameter-um: threshold fluences)")
    p.add_argument("--pulse-ns", type=float, default=None, metavar="NS", help="pump pulse duration (FWHM), ns")
    p.add_argument("--beam", choices=("tophat", "gaussian"), default="tophat", help="pump spot profile")
    p.add_argument("--spot-diameter-um", type=float, default=None, metavar="UM",
                   help="top-hat diameter or Gaussian 1/e^2 diameter of the pump spot")
    p.add_argument("--instrument-fwhm-nm", type=float, default=None, metavar="NM",
                   help="spectrometer FWHM: judge the line narrowing against it")
    add_stack_options(p)
    p.add_argument("--out", type=Path, required=True, metavar="TABLE", help="output table path stem")
    p.set_defaults(handler=handle)


def handle(args):
    from ..safety import CAUTIONS

    try:
        return _handle(args)
    finally:
        print("\n" + CAUTIONS)


def _pump_spec(args):
    from ..exceptions import InputError
    from ..io._cavity_spec import parse_pump

    given = [v is not None for v in (args.wavelength_nm, args.pulse_ns, args.spot_diameter_um)]
    if not any(given) and args.instrument_fwhm_nm is None:
        return None
    doc = {"wavelength_nm": args.wavelength_nm if args.wavelength_nm is not None else 500.0,
           "pulse_s": args.pulse_ns * 1e-9 if args.pulse_ns is not None else 5e-9, "beam": args.beam}
    if any(given) and not all(given):
        raise InputError("a fluence needs the pump wavelength, pulse and spot together",
                         field="--wavelength-nm, --pulse-ns, --spot-diameter-um", expected="all three",
                         found=", ".join(n for n, g in zip(("--wavelength-nm", "--pulse-ns", "--spot-diameter-um"),
                                                           given) if g))
    if args.spot_diameter_um is not None:
        doc["spot_diameter_um"] = args.spot_diameter_um
    if args.instrument_fwhm_nm is not None:
        doc["instrument_fwhm_nm"] = args.instrument_fwhm_nm
    problems = Problems()
    spec = parse_pump(doc, problems, required=True)
    if problems.items:
        raise InputError("; ".join(problems.items).replace("pump.", "--"))
    return spec


def _handle(args):
    import pandas as pd

    from .. import tables
    from ..io import write_table
    from ..pipeline import load_recipe, resolve_parameters
    from ..pipeline._pump import pump_energies, pump_tables

    pump = _pump_spec(args)
    params = resolve_parameters(load_recipe(args.recipe) if args.recipe is not None else {}, source="parameters")
    lines, given_tracks, sidecar = load_lines(args, params)
    n_frames, times = frame_times(lines, sidecar)
    pump_nj, exposure = pump_energies(sidecar, n_frames)
    parts = []
    for cell_id, cell_lines in lines.groupby("cell_id", sort=True):
        cell_lines = cell_lines.reset_index(drop=True)
        _, _, thr = pump_tables(cell_lines, time_s=times, pump_nj=pump_nj, exposure_s=exposure, pump=pump,
                                parameters=params, cell_id=cell_id,
                                tracks=None if given_tracks is None else cell_lines)
        parts.append(thr)
        if not len(thr):
            print(f"{cell_id}: no mode seen at enough pump energies for a threshold fit")
        for r in thr.itertuples():
            text = (f"{cell_id} mode at {r.center_nm:.3f} nm: threshold {r.threshold_nj:.4g} +- "
                    f"{r.threshold_err_nj:.2g} nJ, beta {r.beta:.3g} +- {r.beta_err:.2g}, straight line above "
                    f"threshold {r.linear_threshold_nj:.4g} nJ (expected bias {r.linear_bias:+.1%})")
            if r.threshold_fluence_j_cm2 == r.threshold_fluence_j_cm2:
                text += (f"; threshold fluence {r.threshold_fluence_j_cm2 * 1e3:.3g} mJ/cm^2, highest pump "
                         f"{r.max_fluence_j_cm2:.3g} J/cm^2 = {r.max_fluence_skin_mpe_ratio:.3g} x skin MPE")
            if r.instrument_fwhm_nm == r.instrument_fwhm_nm:
                text += (f"; width {r.fwhm_low_pump_nm:.3f} -> {r.fwhm_high_pump_nm:.3f} nm"
                         f"{' (instrument-limited)' if r.instrument_limited else ''}")
            print(text + ("" if r.fit_ok else f"; FIT NOT OK: {r.fit_message}"))
    table = pd.concat(parts, ignore_index=True) if parts else tables.empty("thresholds")
    for path in write_table(tables.validate(table, "thresholds"), args.out, name="thresholds"):
        print(path)
    return EXIT_OK if len(table) and table["fit_ok"].any() else EXIT_ERROR
