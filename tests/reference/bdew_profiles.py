"""BDEW standard load profiles (H0, G0-G6, L0-L2) for a test window, as JSON.

Source: the Python package demandlib (its bdew.ElecSlp), which ships the BDEW
(German Association of Energy and Water Industries) standard load profiles.
Each class is scaled to a mean of 1 kW over the year; the window's 15-minute
values are printed. demandlib's index is local civil time without DST shifts;
the tests treat it as UTC intervals, which changes no shape.

usage: bdew_profiles.py YEAR MONTH DAY DAYS
"""
import json
import sys
import warnings

import holidays
import demandlib
from demandlib import bdew

CLASSES = ["h0", "g0", "g1", "g2", "g3", "g4", "g5", "g6", "l0", "l1", "l2"]


def main():
    year, month, day, days = (int(a) for a in sys.argv[1:5])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        slp = bdew.ElecSlp(year, holidays=holidays.Germany(years=year))
        # 8760 kWh a year is a mean of 1 kW.
        prof = slp.get_scaled_power_profiles({c: 8760.0 for c in CLASSES})
    start = f"{year:04d}-{month:02d}-{day:02d}"
    window = prof.loc[start:].iloc[: days * 96]
    if len(window) != days * 96:
        raise SystemExit(f"window of {days} days from {start} runs past the year")
    out = {
        "source": "demandlib " + demandlib.__version__ + " bdew.ElecSlp",
        "start": start,
        "classes": {c.upper(): [float(v) for v in window[c].to_numpy()] for c in CLASSES},
    }
    json.dump(out, sys.stdout)


if __name__ == "__main__":
    main()
