"""``lasecyto dose``: fluence, peak irradiance, photons and skin-MPE ratio of one pump pulse."""

from __future__ import annotations

from ._common import EXIT_OK


def register(sub):
    p = sub.add_parser(
        "dose", help="fluence, peak irradiance and photons of one pump pulse (with laser-safety cautions)",
        description="Pump dose of one pulse: fluence (peak fluence for a Gaussian spot), peak irradiance for a "
                    "square and a Gaussian pulse, photons per pulse, and the ratio to the single-pulse skin "
                    "MPE of ANSI Z136.1 / IEC 60825-1 where one is given here. Always prints the laser-safety "
                    "cautions; this is not a safety assessment: your local rules and your institution's laser "
                    "safety officer decide.")
    p.add_argument("--energy-nj", type=float, required=True, metavar="NJ", help="pulse energy, nJ")
    p.add_argument("--pulse-ns", type=float, required=True, metavar="NS", help="pulse duration (FWHM), ns")
    p.add_argument("--wavelength-nm", type=float, required=True, metavar="NM", help="pump wavelength, nm")
    p.add_argument("--beam", choices=("tophat", "gaussian"), default="tophat", help="spot profile")
    spot = p.add_mutually_exclusive_group(required=True)
    spot.add_argument("--spot-diameter-um", type=float, metavar="UM",
                      help="top-hat diameter, or Gaussian 1/e^2 diameter")
    spot.add_argument("--w-um", type=float, metavar="UM", help="Gaussian 1/e^2 radius (with --beam gaussian)")
    p.add_argument("--warn-fraction", type=float, default=None, metavar="F",
                   help="warn when the fluence exceeds this fraction of the skin MPE")
    p.set_defaults(handler=handle)


def handle(args):
    import math
    import warnings

    from ..exceptions import InputError, LasecytoWarning
    from ..safety import CAUTIONS, pulse_dose

    try:
        for option, value, unit in (("--energy-nj", args.energy_nj, "nJ"), ("--pulse-ns", args.pulse_ns, "ns"),
                                    ("--wavelength-nm", args.wavelength_nm, "nm"),
                                    ("--spot-diameter-um", args.spot_diameter_um, "um"), ("--w-um", args.w_um, "um"),
                                    ("--warn-fraction", args.warn_fraction, "")):
            if value is not None and not (math.isfinite(value) and value > 0):
                raise InputError("must be positive and finite", field=option, expected=f"> 0 {unit}".rstrip(),
                                 found=repr(value))
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always", LasecytoWarning)
            dose = pulse_dose(args.energy_nj * 1e-9, pulse_s=args.pulse_ns * 1e-9, beam=args.beam,
                              diameter_um=args.spot_diameter_um, w_um=args.w_um, wavelength_nm=args.wavelength_nm,
                              warn_fraction=args.warn_fraction)
        text = str(dose)  # ends with the cautions
        for w in caught:
            text = f"WARNING: {w.message}\n" + text
        print(text)
    except BaseException:
        print(CAUTIONS)
        raise
    return EXIT_OK
