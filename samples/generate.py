"""Seeded generator for the invented "cold room" demo data set.

The scenario is made up for the boxwood demo and describes no real site.
A gateway in a refrigerated store room logs one row per hour: the outside
ambient temperature, the room air temperature, how long the door was open,
how hard the compressor worked, the evaporator coil temperature relative to
the air, hours since the last defrost and relative humidity.  Two targets are
derived from these readings (plus a hidden frost level and noise):

* ``next_hour_air_temp_c`` -- the room air temperature one hour later
  (regression);
* ``defrost_needed`` -- 0/1 flag that a defrost cycle should be started
  (classification).

Rows are independent hourly snapshots pooled over many invented rooms; they
are not a continuous time series.  Everything is drawn from
``numpy.random.default_rng(seed)``, so the same ``(n_rows, seed)`` always
gives the same frame and the same CSV bytes.

Command line::

    python samples/generate.py [--rows N] [--seed S] -o OUT.csv
"""

import argparse
import csv
import math
import sys

import numpy as np
import pandas as pd

ROOM_TYPES = ["chiller", "freezer", "blast_freezer"]
CATEGORICAL = ["room_type"]
FEATURES = [
    "room_type",
    "ambient_c",
    "air_temp_c",
    "door_open_s",
    "compressor_duty",
    "evaporator_delta_c",
    "hours_since_defrost",
    "humidity_pct",
]
TARGET_REGRESSION = "next_hour_air_temp_c"
TARGET_CLASSIFICATION = "defrost_needed"

DEFAULT_ROWS = 4000
DEFAULT_SEED = 20261201

# Per room type (same order as ROOM_TYPES).
_ROOM_SHARE = np.array([0.5, 0.3, 0.2])          # share of rows
_SETPOINT_C = np.array([3.0, -18.0, -30.0])      # air temperature setpoint
_BASE_EVAP_DELTA_C = np.array([6.0, 7.0, 8.0])   # clean-coil delta (negated)
_BASE_HUMIDITY_PCT = np.array([82.0, 72.0, 66.0])
_CAPACITY_C_PER_H = np.array([2.4, 3.0, 3.2])    # cooling at full duty, clean coil

# Share of missing readings per feature (missing completely at random).
_MISSING_RATE = {"humidity_pct": 0.03, "door_open_s": 0.02, "ambient_c": 0.01}

# Label noise: share of defrost_needed labels flipped after drawing them.
_LABEL_FLIP_RATE = 0.03


def _round(values, decimals):
    """Round to a sensor resolution and turn any -0.0 into 0.0."""
    return np.round(values, decimals) + 0.0


def make_frame(n_rows=DEFAULT_ROWS, seed=DEFAULT_SEED):
    """Return an invented cold-room data set as a pandas DataFrame.

    Columns: ``reading_id``, then FEATURES, then TARGET_REGRESSION and
    TARGET_CLASSIFICATION.  Readings are rounded to sensor resolution
    (0.1 degC, whole seconds, 0.01 duty, 0.1 h, 0.1 %RH).  About 1% of
    ``ambient_c``, 2% of ``door_open_s`` and 3% of ``humidity_pct`` are NaN;
    ``room_type`` and the targets are never missing.
    """
    n = int(n_rows)
    if n < 1:
        raise ValueError("n_rows must be at least 1")
    rng = np.random.default_rng(seed)

    # Room type and the hour of day of each reading.
    room = rng.choice(len(ROOM_TYPES), size=n, p=_ROOM_SHARE)
    setpoint = _SETPOINT_C[room]
    hour = (rng.integers(0, 24) + np.arange(n)) % 24
    daytime = (hour >= 6) & (hour <= 20)

    # Outside ambient: diurnal cycle peaking mid-afternoon, plus weather noise.
    ambient = 22.0 + 6.0 * np.sin(2.0 * np.pi * (hour - 9) / 24.0)
    ambient = ambient + rng.normal(0.0, 2.5, n)
    ambient = _round(np.clip(ambient, 5.0, 40.0), 1)

    # Door: often shut at night; when opened, a heavy-tailed duration.
    p_open = np.where(daytime, 0.85, 0.25)
    opened = rng.random(n) < p_open
    duration = rng.lognormal(mean=3.8, sigma=1.1, size=n)
    door = _round(np.clip(np.where(opened, duration, 0.0), 0.0, 1800.0), 0)
    door_log = np.log1p(door)                      # 0 .. ~7.5
    door_warm = 1.0 - np.exp(-door / 300.0)        # saturating 0 .. 1

    # Defrost timer: most rooms defrost every half day or so, a few lag.
    since_defrost = _round(np.clip(rng.gamma(2.0, 7.0, n), 0.0, 48.0), 1)

    humidity = (_BASE_HUMIDITY_PCT[room] + 1.5 * door_log
                + 0.3 * (ambient - 22.0) + rng.normal(0.0, 7.0, n))
    humidity = _round(np.clip(humidity, 30.0, 100.0), 1)

    # Hidden frost level on the evaporator (0 = clean coil).
    frost = ((since_defrost / 16.0) * (humidity / 75.0)
             * (1.0 + door_log / 6.0))
    efficiency = 1.0 / (1.0 + 0.35 * frost)

    evap_delta = (-(_BASE_EVAP_DELTA_C[room] + 2.2 * frost)
                  + rng.normal(0.0, 0.6, n))
    evap_delta = _round(np.minimum(evap_delta, -0.5), 1)

    # Current air temperature: setpoint, pushed up by door, heat and frost.
    air = (setpoint + 2.0 * door_warm + 0.03 * (ambient - 22.0)
           + 0.25 * frost + rng.normal(0.0, 0.5, n))
    air = _round(air, 1)

    # Compressor duty: the thermostat works harder the warmer the room is
    # relative to setpoint, the bigger the temperature lift and the dirtier
    # the coil.
    duty = (0.15 + 0.006 * (ambient - setpoint) + 0.08 * (air - setpoint)
            + 0.15 * door_warm + 0.06 * frost + rng.normal(0.0, 0.15, n))
    duty = _round(np.clip(duty, 0.02, 1.0), 2)

    # Next hour: heat leak and door load warm the room, the compressor cools
    # it with an efficiency that falls as frost builds up.
    warming = 0.02 * (ambient - air) + 1.5 * door_warm
    cooling = duty * _CAPACITY_C_PER_H[room] * efficiency
    next_air = air + warming - cooling + rng.normal(0.0, 0.15, n)
    next_air = _round(next_air, 1)

    # Defrost flag: logistic in the frost drivers, then a little label noise.
    score = (0.10 * (since_defrost - 14.0)
             + 0.60 * (-evap_delta - _BASE_EVAP_DELTA_C[room] - 2.0)
             + 0.05 * (humidity - 80.0)
             + 0.25 * (door_log - 3.0))
    prob = 1.0 / (1.0 + np.exp(-(1.5 * score - 2.4)))
    defrost = rng.random(n) < prob
    flip = rng.random(n) < _LABEL_FLIP_RATE
    defrost = np.where(flip, ~defrost, defrost).astype(np.int64)

    frame = pd.DataFrame({
        "reading_id": ["R%06d" % (i + 1) for i in range(n)],
        "room_type": [ROOM_TYPES[k] for k in room],
        "ambient_c": ambient,
        "air_temp_c": air,
        "door_open_s": door,
        "compressor_duty": duty,
        "evaporator_delta_c": evap_delta,
        "hours_since_defrost": since_defrost,
        "humidity_pct": humidity,
        TARGET_REGRESSION: next_air,
        TARGET_CLASSIFICATION: defrost,
    })

    # Blank out some readings (targets were computed from the true values).
    for column, rate in _MISSING_RATE.items():
        missing = rng.random(n) < rate
        frame.loc[missing, column] = np.nan
    return frame


def numeric_matrix(frame):
    """Return the FEATURES of ``frame`` as a float64 array of shape (n, 8).

    ``room_type`` becomes its index in ROOM_TYPES (0.0, 1.0, 2.0); missing
    readings stay NaN.  Unknown room types raise ValueError.
    """
    columns = []
    for name in FEATURES:
        if name == "room_type":
            codes = frame[name].map({r: float(i) for i, r in enumerate(ROOM_TYPES)})
            if codes.isna().any():
                bad = sorted(set(frame[name][codes.isna()].astype(str)))
                raise ValueError("unknown room_type value(s): %s" % bad)
            columns.append(codes.to_numpy(dtype=np.float64))
        else:
            columns.append(frame[name].to_numpy(dtype=np.float64))
    return np.column_stack(columns).astype(np.float64, copy=False)


def _cell(value):
    """Format one value for CSV: '' for missing, repr() for floats."""
    if value is None:
        return ""
    if isinstance(value, (float, np.floating)):
        value = float(value)
        if math.isnan(value):
            return ""
        return repr(value)
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    return str(value)


def write_csv(frame, path):
    """Write ``frame`` to ``path`` as CSV with a header row.

    Missing values become empty cells and floats are written with
    ``float.__repr__`` so that reading them back gives identical float64
    values.  Lines end in ``\\n`` on every platform, so the same frame
    always gives the same bytes.
    """
    with open(path, "w", newline="", encoding="utf-8") as handle:
        writer = csv.writer(handle, lineterminator="\n")
        writer.writerow([str(c) for c in frame.columns])
        for row in frame.itertuples(index=False, name=None):
            writer.writerow([_cell(v) for v in row])


def main(argv=None):
    """Command-line entry point: generate the data set and write a CSV."""
    parser = argparse.ArgumentParser(
        description="Generate the invented cold-room demo data set as CSV.")
    parser.add_argument("--rows", type=int, default=DEFAULT_ROWS,
                        help="number of rows (default: %(default)s)")
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED,
                        help="random seed (default: %(default)s)")
    parser.add_argument("-o", "--output", required=True,
                        help="path of the CSV file to write")
    args = parser.parse_args(argv)
    if args.rows < 1:
        parser.error("--rows must be at least 1")

    frame = make_frame(n_rows=args.rows, seed=args.seed)
    write_csv(frame, args.output)
    print("wrote %d rows to %s" % (len(frame), args.output))
    return 0


if __name__ == "__main__":
    sys.exit(main())
