"""Make the demo's sample feeds for the invented port of Port Dunmerrow.

Deterministic (fixed seed): running it twice writes the same bytes. It reads the invented
port constants from ``demo/port.toml`` and writes, beside this file:

- ``history.csv``: 190 days of six-minute levels (``time,level``; metres on the station
  datum) for fitting the harmonic constants;
- ``storm/``: the storm week at one-minute steps from two sensors, each in its own raw
  format, and a barometer; with faults injected for the technician to find;
- ``truth.json``: what was injected and when (the storm, the faults), for the demo's test.

It depends on numpy and the standard library only. The tide is synthesised here, on its own,
from the harmonic formula with the astronomical arguments and nodal corrections written out
below, so that the fit done by ``predictor`` is checked against an independent synthesis
rather than against itself.

References
----------
Schureman, P. (1958). Manual of Harmonic Analysis and Prediction of Tides. U.S. Coast and
Geodetic Survey Special Publication 98 (Doodson arguments, nodal factors).
Meeus, J. (1998). Astronomical Algorithms, 2nd ed., ch. 47 (mean lunar and solar elements).
Pugh, D., Woodworth, P. (2014). Sea-Level Science, ch. 4 and 7 (nodal factor series; inverse
barometer about 1 cm/hPa; wind set-up).
"""
from __future__ import annotations

import argparse
import json
import tomllib
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
PORT_FILE = HERE.parent / "demo" / "port.toml"
SEED = 20251022

HISTORY_START = np.datetime64("2025-04-13T00:00:00")  # 190 days: resolves K1-P1 and S2-K2
HISTORY_END = np.datetime64("2025-10-20T00:00:00")    # exclusive
HISTORY_STEP_S = 360
STORM_START = HISTORY_END
STORM_END = np.datetime64("2025-10-27T00:00:00")      # exclusive; 7 days
STORM_STEP_S = 60
BARO_STEP_S = 600

HOUR = 3600.0
DAY = 86400.0

# Doodson numbers on (tau, s, h, p, N', p1) and the phase offset in degrees
# (Foreman 1977, Table 1, with tau = 15 UT + h - s). N' = -N.
DOODSON = {
    "M2": ((2, 0, 0, 0, 0, 0), 0.0),
    "S2": ((2, 2, -2, 0, 0, 0), 0.0),
    "N2": ((2, -1, 0, 1, 0, 0), 0.0),
    "K2": ((2, 2, 0, 0, 0, 0), 0.0),
    "K1": ((1, 1, 0, 0, 0, 0), 90.0),
    "O1": ((1, -1, 0, 0, 0, 0), -90.0),
    "P1": ((1, 1, -2, 0, 0, 0), -90.0),
    "Q1": ((1, -2, 0, 1, 0, 0), -90.0),
    "M4": ((4, 0, 0, 0, 0, 0), 0.0),
    "MS4": ((4, 2, -2, 0, 0, 0), 0.0),
    "Sa": ((0, 0, 1, 0, 0, 0), 0.0),
    "Ssa": ((0, 0, 2, 0, 0, 0), 0.0),
}


def unix_seconds(t: np.ndarray) -> np.ndarray:
    """Seconds since 1970-01-01 UTC [s] of a datetime64 array."""
    return t.astype("datetime64[s]").astype(np.int64)


def astro_arguments(t: np.ndarray) -> dict[str, np.ndarray]:
    """Mean astronomical arguments [deg] at UTC times ``t`` (datetime64).

    Terrestrial time is taken as UTC (the ~69 s difference moves the Moon's mean longitude by
    about 0.01 deg, far below what the demo needs).

    References
    ----------
    Meeus (1998), eqs. 47.1-47.7 (s, p, N); Meeus (1998) eq. 25.2 (h). The lunar time
    tau = 15 UT[h] + h - s goes with the phase offsets of Foreman (1977), Table 1, so that
    K1's argument tau + s + 90 equals the Greenwich sidereal angle - 90 (Schureman 1958,
    Table 2, writes the same argument as T + h - 90 with T = 180 + 15 UT).
    """
    secs = unix_seconds(t).astype(float)
    jd = secs / DAY + 2440587.5
    T = (jd - 2451545.0) / 36525.0
    s = 218.3164477 + 481267.88123421 * T
    h = 280.46646 + 36000.76983 * T
    p = 83.3532465 + 4069.0137287 * T
    N = 125.0445479 - 1934.1362891 * T
    p1 = 282.93735 + 1.71946 * T
    ut_hours = (secs % DAY) / HOUR
    tau = 15.0 * ut_hours + h - s
    return {"tau": tau, "s": s, "h": h, "p": p, "Np": -N, "p1": p1, "N": N}


def nodal(name: str, N_deg: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Nodal factor f [1] and correction u [deg] from the Moon's node longitude N [deg].

    References
    ----------
    Pugh, D. (1987). Tides, Surges and Mean Sea-Level, Table 4.3 (series in N), as also given
    in Pugh and Woodworth (2014); values typed from memory of that table.
    """
    N = np.radians(N_deg)
    one = np.ones_like(N)
    if name in ("M2", "N2"):
        return 1.0004 - 0.0373 * np.cos(N) + 0.0002 * np.cos(2 * N), -2.14 * np.sin(N)
    if name == "K2":
        f = 1.0241 + 0.2863 * np.cos(N) + 0.0083 * np.cos(2 * N) - 0.0015 * np.cos(3 * N)
        u = -17.74 * np.sin(N) + 0.68 * np.sin(2 * N) - 0.04 * np.sin(3 * N)
        return f, u
    if name == "K1":
        f = 1.0060 + 0.1150 * np.cos(N) - 0.0088 * np.cos(2 * N) + 0.0006 * np.cos(3 * N)
        u = -8.86 * np.sin(N) + 0.68 * np.sin(2 * N) - 0.07 * np.sin(3 * N)
        return f, u
    if name in ("O1", "Q1"):
        f = 1.0089 + 0.1871 * np.cos(N) - 0.0147 * np.cos(2 * N) + 0.0014 * np.cos(3 * N)
        u = 10.80 * np.sin(N) - 1.34 * np.sin(2 * N) + 0.19 * np.sin(3 * N)
        return f, u
    if name == "M4":
        f, u = nodal("M2", N_deg)
        return f * f, 2 * u
    if name == "MS4":
        return nodal("M2", N_deg)
    return one, 0.0 * N  # S2, P1, Sa, Ssa: solar, no nodal modulation


def tide(t: np.ndarray, mean: float, constituents: list[dict]) -> np.ndarray:
    """Astronomical tide [m] at UTC times ``t`` from harmonic constants.

    h(t) = Z0 + sum_k f_k H_k cos(V_k + u_k - g_k).

    References
    ----------
    Schureman (1958), sec. 32-35; Foreman (1977), eq. (1).
    """
    a = astro_arguments(t)
    level = np.full(t.shape, mean, dtype=float)
    for c in constituents:
        (d_tau, d_s, d_h, d_p, d_np, d_p1), offset = DOODSON[c["name"]]
        V = (d_tau * a["tau"] + d_s * a["s"] + d_h * a["h"] + d_p * a["p"]
             + d_np * a["Np"] + d_p1 * a["p1"] + offset)
        f, u = nodal(c["name"], a["N"])
        level += f * c["amplitude"] * np.cos(np.radians(V + u - c["phase"]))
    return level


def red_noise(rng: np.random.Generator, n: int, step_s: float, sd: float, tau_s: float) -> np.ndarray:
    """AR(1) noise with standard deviation ``sd`` [m] and correlation time ``tau_s`` [s]."""
    phi = np.exp(-step_s / tau_s)
    e = rng.normal(0.0, sd * np.sqrt(1 - phi * phi), n)
    x = np.empty(n)
    x[0] = rng.normal(0.0, sd)
    for i in range(1, n):
        x[i] = phi * x[i - 1] + e[i]
    return x


def bump(t_s: np.ndarray, centre_s: float, width_s: float) -> np.ndarray:
    """Gaussian pulse of unit height [1] centred at ``centre_s`` with sd ``width_s``."""
    return np.exp(-0.5 * ((t_s - centre_s) / width_s) ** 2)


def turning_points(t_s: np.ndarray, h: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Indices of the high and of the low waters of a sampled curve."""
    d = np.diff(h)
    highs = np.where((d[:-1] > 0) & (d[1:] <= 0))[0] + 1
    lows = np.where((d[:-1] < 0) & (d[1:] >= 0))[0] + 1
    return highs, lows


def iso(secs: np.ndarray | int) -> np.ndarray:
    """ISO 8601 UTC strings with ``Z`` for Unix seconds."""
    return np.datetime_as_string(np.asarray(secs).astype("datetime64[s]"), unit="s", timezone="UTC")


def iso1(secs: float) -> str:
    return str(iso(int(round(secs))))


def load_port(path: Path = PORT_FILE) -> dict:
    with open(path, "rb") as fh:
        return tomllib.load(fh)


def build(port: dict) -> dict:
    """Compute every series and the truth record (no file I/O)."""
    rng = np.random.default_rng(SEED)
    dat = port["datums"]
    lv = port["levels"]
    cd = dat["chart_datum"]                       # CD above station datum [m]
    consts = port["tide"]["constituents"]
    mean_sd = port["tide"]["mean"] + cd           # mean on the station datum [m]

    # --- history: tide + weather, six-minute samples, station datum
    th = np.arange(HISTORY_START, HISTORY_END, np.timedelta64(HISTORY_STEP_S, "s"))
    th_s = unix_seconds(th)
    hist = (tide(th, mean_sd, consts)
            + red_noise(rng, th.size, HISTORY_STEP_S, 0.045, 10 * HOUR)
            + rng.normal(0.0, 0.004, th.size))

    # --- storm week, one-minute true sea level (station datum)
    ts = np.arange(STORM_START, STORM_END, np.timedelta64(STORM_STEP_S, "s"))
    ts_s = unix_seconds(ts).astype(float)
    astro = tide(ts, mean_sd, consts)
    highs, lows = turning_points(ts_s, astro)

    # Main peak: the highest high water between 22 Oct 06:00 and 23 Oct 18:00 UTC (springs).
    w0 = unix_seconds(np.datetime64("2025-10-22T06:00:00"))
    w1 = unix_seconds(np.datetime64("2025-10-23T18:00:00"))
    cand = highs[(ts_s[highs] >= w0) & (ts_s[highs] <= w1)]
    i2 = cand[np.argmax(astro[cand])]
    t2 = ts_s[i2]
    # First peak: the low water nearest to 30 hours before the main one.
    i1 = lows[np.argmin(np.abs(ts_s[lows] - (t2 - 30 * HOUR)))]
    t1 = ts_s[i1]

    # Weather: a secondary low then the main low. Inverse barometer 1 cm/hPa (Pugh and
    # Woodworth 2014, sec. 7.2), plus an onshore wind set-up pulse with each low.
    p_ref = 1013.0
    pressure = p_ref - 14.0 * bump(ts_s, t1, 9 * HOUR) - 36.0 * bump(ts_s, t2, 10 * HOUR)
    ib = 0.01 * (p_ref - pressure)
    wind = 0.66 * bump(ts_s, t1, 4.5 * HOUR) + 0.72 * bump(ts_s, t2, 5.0 * HOUR)
    weather = red_noise(rng, ts.size, STORM_STEP_S, 0.02, 8 * HOUR)
    surge = ib + wind + weather
    sea = astro + surge

    boards_out_sd = lv["boards_out"] + cd
    quay_top_sd = lv["quay_top"] + cd

    # --- primary: pressure sensor, metres above its own zero, one-minute
    primary_true = sea + rng.normal(0.0, 0.004, ts.size)
    primary = primary_true.copy()
    # Spikes: single samples. The first rides a normal high water and on its own would
    # cross the boards-out level; it must not raise an alert.
    # The highest high water before the storm's own, surge included.
    earlier = highs[highs < i2 - 120]
    hw_near_miss = earlier[np.argmax(sea[earlier])]
    spike_at = [
        int(hw_near_miss),
        int(np.searchsorted(ts_s, t1 - 8.5 * HOUR)),
        int(i1 + 25),
        int(np.searchsorted(ts_s, t2 - 3.3 * HOUR)),
    ]
    spike_size = [0.38, -0.27, 0.22, 0.31]
    for i, dz in zip(spike_at, spike_size):
        primary[i] += dz
    # Stuck for 70 minutes on the flood after the first peak: the same value repeated.
    stuck0 = int(np.searchsorted(ts_s, t1 + 3 * HOUR))
    stuck1 = stuck0 + 70
    primary[stuck0:stuck1] = primary[stuck0]
    # A gap of 100 minutes on the ebb after the main peak.
    gap0 = int(np.searchsorted(ts_s, t2 + 6 * HOUR))
    gap1 = gap0 + 100
    keep = np.ones(ts.size, bool)
    keep[gap0:gap1] = False
    primary_raw = primary - dat["primary_sensor_zero"]

    # --- backup: centimetres above its own zero; drifts 3 mm/day; its logger clock runs
    # 6 minutes late for 12 hours (a reading taken at true time t is stamped t - 6 min).
    drift_per_day = 0.003
    clock_late_s = 360
    clock0 = t1 + 8 * HOUR
    clock1 = t1 + 20 * HOUR
    stamp = ts_s.copy()
    late = (ts_s >= clock0) & (ts_s < clock1)
    # Sample the sea at the stamped time + lateness: what the late logger labels "t".
    sea_at = np.interp(ts_s + np.where(late, clock_late_s, 0), ts_s, sea)
    backup_level = (sea_at + drift_per_day * (ts_s - ts_s[0]) / DAY
                    + rng.normal(0.0, 0.005, ts.size))
    backup_raw_cm = 100.0 * (backup_level - dat["backup_sensor_zero"])

    # --- barometer, hPa, ten-minute samples
    tb_idx = np.arange(0, ts.size, BARO_STEP_S // STORM_STEP_S)
    baro = pressure[tb_idx] + rng.normal(0.0, 0.15, tb_idx.size)

    # --- truth
    surge_clean = ib + wind
    peak_i = int(np.argmax(sea))
    def crossing(level_sd: float) -> dict | None:
        above = sea > level_sd
        idx = np.where(above)[0]
        if not idx.size:
            return None
        return {"level_sd": round(level_sd, 3), "first": iso1(ts_s[idx[0]]),
                "last": iso1(ts_s[idx[-1]]), "minutes_above": int(above.sum())}
    # Short window for the quick test: from 12 h before the first peak to 11.5 h after the main one.
    short0 = t1 - 12 * HOUR
    short1 = t2 + 11.5 * HOUR  # ends before local midnight: three local days
    normal_hw_max = float(astro[highs].max() + 0.0)

    truth = {
        "about": "Injected scenario for the invented port of Port Dunmerrow (demo only). "
                 "Times UTC; levels metres on the station datum unless named otherwise.",
        "seed": SEED,
        "port": port["port"]["name"],
        "station": port["port"]["station"],
        "history": {"start": iso1(th_s[0]), "end": iso1(th_s[-1]), "step_s": HISTORY_STEP_S,
                    "n": int(th.size)},
        "storm_week": {"start": iso1(ts_s[0]), "end": iso1(ts_s[-1]), "step_s": STORM_STEP_S},
        "short_window": {"start": iso1(short0), "end": iso1(short1)},
        "datums": {"chart_datum_above_station_datum": cd,
                   "boards_out_sd": boards_out_sd, "quay_top_sd": quay_top_sd},
        "storm": {
            "first_peak": {"time": iso1(t1), "near": "low water",
                           "surge": round(float(surge_clean[i1]), 3),
                           "tide": round(float(astro[i1]), 3)},
            "main_peak": {"time": iso1(t2), "near": "high water",
                          "surge": round(float(surge_clean[i2]), 3),
                          "tide": round(float(astro[i2]), 3),
                          "level": round(float(sea[i2]), 3)},
            "highest_level": {"time": iso1(ts_s[peak_i]), "level": round(float(sea[peak_i]), 3)},
            "min_pressure_hpa": round(float(pressure.min()), 1),
            "inverse_barometer_m_per_hpa": 0.01,
            "boards_out_crossed": crossing(boards_out_sd),
            "quay_top_crossed": crossing(quay_top_sd),
            "highest_normal_high_water_sd": round(normal_hw_max, 3),
        },
        "faults": {
            "spikes": [{"sensor": "primary", "time": iso1(ts_s[i]), "size": dz,
                        "level_with_spike": round(float(primary[i]), 3)}
                       for i, dz in zip(spike_at, spike_size)],
            "flat_line": {"sensor": "primary", "start": iso1(ts_s[stuck0]),
                          "end": iso1(ts_s[stuck1 - 1]), "minutes": stuck1 - stuck0,
                          "value": round(float(primary[stuck0]), 3)},
            "gap": {"sensor": "primary", "start": iso1(ts_s[gap0]), "end": iso1(ts_s[gap1 - 1]),
                    "minutes": gap1 - gap0},
            "drift": {"sensor": "backup", "mm_per_day": drift_per_day * 1000,
                      "from": iso1(ts_s[0])},
            "clock_offset": {"sensor": "backup", "minutes_late": clock_late_s / 60,
                             "start": iso1(clock0), "end": iso1(clock1)},
        },
    }
    return {
        "history": (th_s, hist),
        "primary": (ts_s[keep].astype(np.int64), primary_raw[keep]),
        "backup": (stamp.astype(np.int64), backup_raw_cm),
        "barometer": (ts_s[tb_idx].astype(np.int64), baro),
        "truth": truth,
    }


def write_csv(path: Path, header: str, secs: np.ndarray, values: np.ndarray, fmt: str) -> None:
    times = iso(secs)
    with open(path, "w", newline="\n") as fh:
        fh.write(header + "\n")
        for t, v in zip(times, values):
            fh.write(f"{t},{v:{fmt}}\n")


def write_backup_lines(path: Path, station_code: str, secs: np.ndarray, cm: np.ndarray) -> None:
    """The backup logger's line format: ``QW1 STATION YYYYMMDDThhmmssZ LEVEL cm``.

    The time is ISO 8601 basic format, UTC.
    """
    stamps = np.datetime_as_string(secs.astype("datetime64[s]"), unit="s")
    with open(path, "w", newline="\n") as fh:
        for s, v in zip(stamps, cm):
            compact = s.replace("-", "").replace(":", "") + "Z"
            fh.write(f"QW1 {station_code} {compact} {v:.1f} cm\n")


def write_all(out: Path = HERE, port_file: Path = PORT_FILE) -> dict:
    port = load_port(port_file)
    data = build(port)
    (out / "storm").mkdir(parents=True, exist_ok=True)
    write_csv(out / "history.csv", "time,level", *data["history"], ".3f")
    write_csv(out / "storm" / "primary.csv", "time,level", *data["primary"], ".3f")
    write_backup_lines(out / "storm" / "backup.txt", "DNM2", *data["backup"])
    write_csv(out / "storm" / "barometer.csv", "time,pressure", *data["barometer"], ".1f")
    with open(out / "truth.json", "w") as fh:
        json.dump(data["truth"], fh, indent=2)
        fh.write("\n")
    return data["truth"]


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", type=Path, default=HERE, help="output folder (default: beside this file)")
    args = ap.parse_args(argv)
    truth = write_all(args.out)
    print(json.dumps(truth["storm"], indent=2))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
