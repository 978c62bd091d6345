"""Next high water forecast: is its 90 % range honest in a storm?

Many invented storms on an invented coast, made here and nowhere else (not the demo's
scenario): a tide of five constituents at their standard speeds with invented constants,
a background residual (the inverse barometer of a wandering pressure plus red-noise wind
set-up), and storms arriving at random: bell-shaped, fast-rise-slow-decay, slow-build-then-
drop, double-peaked and plateau surges, 3 to 16 h wide, 0.2 to 1.8 m high (one in seven a
negative surge), peaking at any phase of the tide, each with its own low-pressure system
passing up to 6 h before the wind's peak, and a tide-surge interaction that damps the wind's
part at high water. A training history (three years) teaches the forecaster; a separate test
record (six years, another seed) is forecast from every high water at leads of
1 to 12 h, and what came is the observed high water: the highest observed level of the cycle,
computed here from the invented record.

Measured for each lead, overall and in storm conditions (|residual| > 0.3 m, or rising faster
than 0.1 m/h over the last 3 h), against today's unconditioned method in the same run (the
quantiles of the residual's change over the lead time in the whole history, added to
persistence):

- coverage of the 90 % range (and how much falls below and above it);
- mean width of the range [m];
- centre error: mean absolute error of the centre [m] (persistence for today's method).

Targets (non-zero exit on a miss): the conditioned method's coverage within 85-95 % at every
lead, overall and in storm conditions; the wide fallback (a history with too few storms)
covers at least 90 % of storm cases at every lead; the conditioned range in calm conditions
is at most 1.5 times as wide as today's (it must not buy its storm coverage by being wide
when the sea is quiet).

Memory (issue 16: a daemon keeps one learnt forecaster per station, the whole daemon is to
stay under 0.5 MiB per station): what the forecaster learnt from the three-year history
still holds once learnt (``tracemalloc``: Python allocations, numpy arrays included, made
while learning and still alive), against the history's residual grid as float32 values
measured in the same run (what the forecaster used to keep). Target: under 0.2 MiB.

Learning cost (issue 16: under 5 ms of CPU per station-minute in all): the daemon learns again
from the store (:func:`read_history`: the ten-minute means of three years of one-minute smoothed
residual, kept in ``residual_bins`` at each write, then :meth:`SurgeForecaster.learn`). Measured:
the CPU of reading the history against SQLite grouping the one-minute rows into the same means
(how it was read before, measured in the same run); the CPU of one such learn
(best of 3), amortised per station-minute (a) learnt every 6 h of data as the daemon did
before (the baseline, the same learn in the same run) and (b) on :func:`relearn_due`'s
schedule replayed over the last year of the three-year history (storm states from the
history itself), for the stormy coast above (a conditioned model) and a calm one with fewer
storms than the 20 needed (the wide rule: every storm brings the learn back every 6 h).
Target: (b) under 0.5 ms per station-minute for both.

Run: ``python -m benchmarks.bench_forecast``.
"""
from __future__ import annotations

import gc
import sqlite3
import tempfile
import time
import tracemalloc
from pathlib import Path

import numpy as np
import pandas as pd
from scipy.signal import lfilter

STEP = 600.0           # [s] the record's step (the daemon's residual grid)
HOUR = 3600.0
DAY = 86400.0
LEADS = range(1, 13)   # [h]
TARGET = (0.85, 0.95)
FALLBACK_MIN = 0.90
CALM_WIDTH_RATIO = 1.5

# Standard speeds [deg/h] of M2, S2, N2, K1, O1 (Schureman 1958, Table 2, from memory) and
# invented amplitudes [m] and phases [deg] of a semidiurnal coast.
SPEEDS = np.radians([28.9841042, 30.0, 28.4397295, 15.0410686, 13.9430356]) / HOUR
AMPS = np.array([1.15, 0.38, 0.22, 0.14, 0.11])
PHASES = np.radians([40.0, 75.0, 20.0, 160.0, 140.0])
MEAN = 3.1
SHAPES = ("bell", "fast-rise", "slow-build", "double", "plateau")


from benchmarks.targets import TargetMissed, Targets

#: [MiB] retained by one learnt forecaster (issue 16's memory per station, shared out).
MEMORY_TARGET_MIB = 0.2
#: [ms] learning's CPU per station-minute, amortised (a tenth of issue 16's 5 ms in all).
LEARN_TARGET_MS = 0.5


def tide(t: np.ndarray) -> np.ndarray:
    """The invented coast's astronomical tide [m] at Unix times ``t`` [s]."""
    return MEAN + np.cos(np.outer(t, SPEEDS) - PHASES) @ AMPS


def _red(rng, n: int, sd: float, tau: float) -> np.ndarray:
    phi = np.exp(-STEP / tau)
    return lfilter([1.0], [1.0, -phi], rng.normal(0, sd * np.sqrt(1 - phi ** 2), n))


def _shape(rng, t: np.ndarray, t0: float, kind: str, w: float) -> np.ndarray:
    """A storm's wind set-up of unit peak centred near ``t0`` with time scale ``w`` [s]."""
    x = (t - t0) / w
    if kind == "bell":
        return np.exp(-0.5 * x * x)
    if kind == "fast-rise":
        rise, decay = w * rng.uniform(0.3, 0.6), w * rng.uniform(1.2, 2.5)
        return np.where(t < t0, np.exp(-0.5 * ((t - t0) / rise) ** 2), np.exp(-np.clip(t - t0, 0, None) / decay))
    if kind == "slow-build":
        rise, drop = w * rng.uniform(1.2, 2.2), w * rng.uniform(0.2, 0.5)
        return np.where(t < t0, np.exp(-0.5 * ((t - t0) / rise) ** 2), np.exp(-0.5 * ((t - t0) / drop) ** 2))
    if kind == "double":
        gap, second = w * rng.uniform(1.5, 3.0), rng.uniform(0.5, 1.1)
        return (np.exp(-0.5 * x * x) + second * np.exp(-0.5 * ((t - t0 - gap) / w) ** 2)) / max(1.0, second)
    half = w * rng.uniform(1.0, 2.5)   # plateau
    return 0.25 * (1 + np.tanh((t - t0 + half) / (0.4 * w))) * (1 - np.tanh((t - t0 - half) / (0.4 * w)))


def coast(seed: int, days: float, storms_per_30_days: float, t0: float) -> dict:
    """An invented record: tide, observed level and pressure every 10 minutes, with storms."""
    rng = np.random.default_rng(seed)
    n = int(days * DAY / STEP)
    t = t0 + STEP * np.arange(n)
    pressure = 1013.0 + _red(rng, n, 7.0, 2.5 * DAY)
    wind = _red(rng, n, 0.05, 10 * HOUR)
    count = rng.poisson(storms_per_30_days * days / 30)
    for c in np.sort(rng.uniform(t[0] + 2 * DAY, t[-1] - 2 * DAY, count)):
        kind = SHAPES[rng.integers(len(SHAPES))]
        w = rng.uniform(3, 16) * HOUR
        peak = min(rng.lognormal(np.log(0.6), 0.45), 1.8) * (-0.6 if rng.random() < 1 / 7 else 1.0)
        share = min(rng.uniform(0.2, 0.6), 0.45 / abs(peak))   # of the peak from the inverse barometer
        lead = rng.uniform(0, 6) * HOUR                        # the low passes before the wind peaks
        pressure -= share * peak / 0.01 * np.exp(-0.5 * ((t - c + lead) / (w * rng.uniform(1.2, 2.0))) ** 2)
        wind += (1 - share) * peak * _shape(rng, t, c, kind, w)
    astro = tide(t)
    # Tide-surge interaction: the wind's set-up is smaller near high water than near low water
    # (Horsburgh & Wilson 2007 describe the effect; the 12 % here is invented).
    interaction = -0.12 * wind * (astro - MEAN) / AMPS[:3].sum()
    residual = -0.01 * (pressure - 1013.0) + wind + interaction
    observed = astro + residual + rng.normal(0, 0.01, n)
    return {"t": t, "tide": astro, "observed": observed, "pressure": pressure + rng.normal(0, 0.2, n),
            "storms": count}


def turning_points(t: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Predicted high water times and levels, and low water times, refined by a parabola."""
    h = tide(t)
    d = np.diff(h)
    hi = np.flatnonzero((d[:-1] > 0) & (d[1:] <= 0)) + 1
    lo = np.flatnonzero((d[:-1] < 0) & (d[1:] >= 0)) + 1

    def refine(i):
        den = h[i - 1] - 2 * h[i] + h[i + 1]
        return t[i] + 0.5 * (h[i - 1] - h[i + 1]) / den * STEP

    hw_t = refine(hi)
    return hw_t, tide(hw_t), refine(lo)


def prepared(c: dict) -> dict:
    """What the monitor would hold: the smoothed residual on the grid (a trailing 30-minute
    mean), the pressure, and each high water's skew surge (highest observed level between the
    neighbouring predicted low waters minus the predicted high water, Williams et al. 2016)."""
    t, raw = c["t"], c["observed"] - c["tide"]
    smooth = np.convolve(raw, np.ones(3) / 3)[: len(raw)]
    smooth[:2] = raw[:2]
    hw_t, hw_level, lw_t = turning_points(t)
    skew = np.full(len(hw_t), np.nan)
    for k, th in enumerate(hw_t):
        j = np.searchsorted(lw_t, th)
        if 0 < j < len(lw_t):
            m = (t >= lw_t[j - 1]) & (t <= lw_t[j])
            skew[k] = c["observed"][m].max() - hw_level[k]
    index = pd.to_datetime(t, unit="s", utc=True)
    return {"t": t, "r": smooth, "p": c["pressure"], "hw_t": hw_t, "skew": skew,
            "grid": pd.Series(smooth, index=index), "pgrid": pd.Series(c["pressure"], index=index)}


def cases(d: dict) -> pd.DataFrame:
    """Every forecast of the test record: each high water from 1 to 12 h before it."""
    back = int(3 * HOUR / STEP)
    rows = []
    for k, th in enumerate(d["hw_t"]):
        if not np.isfinite(d["skew"][k]):
            continue
        for lead in LEADS:
            i = int(np.floor((th - lead * HOUR - d["t"][0]) / STEP))
            if i < back:
                continue
            r = d["r"][i]
            rows.append((k, (th - d["t"][i]) / HOUR, lead, r, (r - d["r"][i - back]) / 3.0,
                         (d["p"][i] - d["p"][i - back]) / 3.0, d["skew"][k] - r))
    return pd.DataFrame(rows, columns=["hw", "lead_h", "lead", "r", "rate", "tendency", "y"])


def todays_method(history: np.ndarray, lead_h: np.ndarray, coverage: float = 0.90) -> tuple:
    """Quantiles of the residual's change over each lead in the whole history (written out
    here again: the benchmark's own copy of the unconditioned method)."""
    lo, hi = np.empty(len(lead_h)), np.empty(len(lead_h))
    for steps in np.unique(np.rint(lead_h * HOUR / STEP).astype(int)):
        diff = history[steps:] - history[:-steps]
        q = np.quantile(diff[np.isfinite(diff)], [(1 - coverage) / 2, (1 + coverage) / 2])
        m = np.rint(lead_h * HOUR / STEP).astype(int) == steps
        lo[m], hi[m] = q
    return lo, np.zeros(len(lead_h)), hi


def score(test: pd.DataFrame, lo, centre, hi) -> pd.DataFrame:
    """Per lead: coverage, below, above, width and centre error, overall and in storms."""
    y = test["y"].to_numpy()
    storm = (np.abs(test["r"]) > 0.3) | (test["rate"] > 0.1)
    inside = (y >= lo) & (y <= hi)
    rows = []
    for lead in LEADS:
        m = (test["lead"] == lead).to_numpy()
        for name, sel in (("all", m), ("storm", m & storm.to_numpy()), ("calm", m & ~storm.to_numpy())):
            rows.append({"lead": lead, "set": name, "n": int(sel.sum()), "coverage": inside[sel].mean(),
                         "below": (y[sel] < lo[sel]).mean(), "above": (y[sel] > hi[sel]).mean(),
                         "width": (hi - lo)[sel].mean(), "error": np.abs(y[sel] - centre[sel]).mean()})
    return pd.DataFrame(rows).set_index(["lead", "set"])


def retained_mib(make) -> tuple[float, object]:
    """Python allocations [MiB] made by ``make()`` and still alive after it returns, with
    what it returned (kept alive while measured)."""
    gc.collect()
    tracemalloc.start()
    kept = make()
    gc.collect()
    current = tracemalloc.get_traced_memory()[0]
    tracemalloc.stop()
    return current / 2 ** 20, kept


def store_with_history(folder: Path, d: dict, skew: pd.DataFrame) -> Path:
    """A store holding the history as the daemon leaves it: one-minute smoothed residual
    (the ten-minute record interpolated) in ``derived`` and the skew surges."""
    from monitor.store.database import Store

    path = folder / "history.sqlite"
    t = np.arange(d["t"][0], d["t"][-1] + 1, 60.0)
    r = np.interp(t, d["t"], d["r"])
    with Store.open(path) as store:
        with store.transaction() as conn:
            store.write_derived_rows("bench", t.astype(np.int64), {"smoothed": r})  # with its ten-minute means
            ok = skew.dropna()
            conn.executemany("INSERT INTO skew_surges (station, hw_t, skew_surge) VALUES ('bench', ?, ?)",
                             zip(ok["hw_t"].astype(np.int64).tolist(), ok["skew_surge"].tolist()))
    return path


def learns_on_schedule(forecaster, d: dict, days: float) -> int:
    """Learns :func:`relearn_due` asks for over the last ``days`` of the history, with the
    storm state of each ten-minute step taken from the history itself."""
    from monitor.service.daemon import HISTORY_REFRESH
    from monitor.surge.forecast import is_storm, rates, relearn_due

    storm = is_storm(d["r"], rates(d["grid"]))
    first = len(d["t"]) - int(days * DAY / STEP)
    learnt_at, seen, learns = d["t"][first], False, 0
    for i in range(first, len(d["t"])):
        seen |= bool(storm[i])
        if relearn_due(forecaster, d["t"][i] - learnt_at, seen, least_s=HISTORY_REFRESH):
            learns, learnt_at, seen = learns + 1, d["t"][i], False
    return learns


def best_cpu(work, rounds: int = 3) -> tuple[float, object]:
    """The least CPU time [s] of ``rounds`` runs of ``work()``, and what the last returned."""
    best, out = np.inf, None
    for _ in range(rounds):
        gc.collect()
        c0 = time.process_time()
        out = work()
        best = min(best, time.process_time() - c0)
    return best, out


def learn_cost(scenarios: list, targets: Targets) -> None:
    """CPU of learning from the store, amortised per station-minute, before and now, for each
    ``(label, history, skew surges)`` of ``scenarios``."""
    from monitor.service.daemon import HISTORY_REFRESH
    from monitor.surge.forecast import SurgeForecaster, read_history

    for label, train, skew in scenarios:
        with tempfile.TemporaryDirectory() as tmp:
            path = store_with_history(Path(tmp), train, skew)
            conn = sqlite3.connect(str(path))
            try:
                end = int(train["t"][-1])
                start = end - 3 * 365 * 86400
                kept, _ = best_cpu(lambda: read_history(conn, "bench", start, end))
                grouped, _ = best_cpu(lambda: conn.execute(
                    # the read as it was before the kept means, word for word
                    "SELECT (t / 600) * 600 AS b, avg(smoothed) FROM derived WHERE station = 'bench' AND t BETWEEN ? "
                    "AND ? AND smoothed IS NOT NULL GROUP BY b ORDER BY b", (start, end)).fetchall())
                print(f"reading the history, {label}: {kept:.3f} s CPU from the kept means, {grouped:.3f} s grouping "
                      f"the rows (before; ratio {grouped / kept:.1f})")
                best, learnt = best_cpu(lambda: SurgeForecaster.learn(*read_history(conn, "bench", start, end)[:2],
                                                                      None, min_storms=20))
            finally:
                conn.close()
        days = 365.0
        learns = learns_on_schedule(learnt, train, days)
        before = best * 1e3 / (HISTORY_REFRESH / 60)
        now = best * 1e3 * learns / (days * 1440)
        kind = "conditioned" if learnt.models[False] is not None else "wide rule"
        print(f"learning from the store, {label} ({learnt.storms} storms in {learnt.history_days:.0f} days, {kind}): "
              f"{best:.2f} s CPU a learn; every 6 h (before) {before:.3f} ms per station-minute; on the schedule "
              f"{learns} learns in the last {days:.0f} days -> {now:.3f} ms per station-minute (ratio {before / now:.1f})")
        targets.below(f"learning CPU per station-minute, {label} [ms]", now, LEARN_TARGET_MS, ".3f")


def main() -> None:
    from monitor.surge.forecast import SurgeForecaster

    t_start = time.perf_counter()
    train_c = coast(seed=20260101, days=3 * 365, storms_per_30_days=2.5, t0=1.60e9)
    test_c = coast(seed=20260202, days=6 * 365, storms_per_30_days=2.5, t0=2.00e9)
    train, test = prepared(train_c), prepared(test_c)
    skew = pd.DataFrame({"hw_t": train["hw_t"], "skew_surge": train["skew"]})
    print(f"invented coast: training history {len(train['t']) * STEP / DAY:.0f} days with {train_c['storms']} storms; "
          f"test record {len(test['t']) * STEP / DAY:.0f} days with {test_c['storms']} storms")

    t0 = time.perf_counter()
    learnt = SurgeForecaster.learn(train["grid"], skew, train["pgrid"], min_storms=20)
    t_learn = time.perf_counter() - t0
    wide = SurgeForecaster.learn(train["grid"], skew, train["pgrid"], min_storms=10 ** 6)
    cs = cases(test)
    args = (cs["lead_h"].to_numpy(), cs["r"].to_numpy(), cs["rate"].to_numpy(), cs["tendency"].to_numpy())
    lo, c, hi, conditioned, used_p = learnt.ranges(*args)
    new = score(cs, lo, c, hi)
    new_persist = score(cs, lo, np.zeros(len(c)), hi)
    old = score(cs, *todays_method(train["r"], cs["lead_h"].to_numpy()))
    wlo, wc, whi, _, _ = wide.ranges(*args)
    fallback = score(cs, wlo, wc, whi)
    rising = cs["r"].to_numpy() * 0 + np.clip(cs["rate"].to_numpy(), 0, None) * cs["lead_h"].to_numpy()
    keeps_rising = score(cs, lo, rising, hi)
    print(f"learnt in {t_learn:.2f} s from {learnt.storms} storms ({learnt.storms_with_pressure} with pressure); "
          f"{conditioned.mean():.1%} of test forecasts conditioned, {used_p.mean():.1%} with the pressure tendency; "
          f"{len(cs):,} forecasts, {int(((np.abs(cs['r']) > 0.3) | (cs['rate'] > 0.1)).sum()):,} in storm conditions")
    print()
    print("coverage of the 90 % range [below/above], mean width [m], centre error [m]: new (conditioned) | today's")
    head = (f"{'lead':>4} {'set':>5} {'n':>6}  {'new cov':>7} {'[below/above]':>13} {'width':>6} {'error':>6}   "
            f"{'old cov':>7} {'[below/above]':>13} {'width':>6} {'error':>6}   {'wide cov':>8} {'width':>6}")
    print(head)
    misses = []
    for lead in LEADS:
        for name in ("all", "storm", "calm"):
            a, b, w = new.loc[(lead, name)], old.loc[(lead, name)], fallback.loc[(lead, name)]
            print(f"{lead:>3}h {name:>5} {int(a['n']):>6}  {a['coverage']:7.1%} "
                  f"[{a['below']:5.1%}/{a['above']:5.1%}] {a['width']:6.2f} {a['error']:6.3f}   "
                  f"{b['coverage']:7.1%} [{b['below']:5.1%}/{b['above']:5.1%}] {b['width']:6.2f} {b['error']:6.3f}   "
                  f"{w['coverage']:8.1%} {w['width']:6.2f}")
            if name in ("all", "storm") and not TARGET[0] <= a["coverage"] <= TARGET[1]:
                misses.append(f"{lead} h {name}: coverage {a['coverage']:.1%} outside 85-95 %")
            if name == "storm" and w["coverage"] < FALLBACK_MIN:
                misses.append(f"{lead} h storm: wide fallback covers {w['coverage']:.1%} < 90 %")
            if name == "calm" and a["width"] > CALM_WIDTH_RATIO * b["width"]:
                misses.append(f"{lead} h calm: width {a['width']:.2f} m > {CALM_WIDTH_RATIO} x today's {b['width']:.2f} m")
    print()
    print("centre error in storm conditions [m] by lead 1..12 h:")
    for label, frame in (("fitted centre (used)", new), ("persistence (today's)", new_persist),
                         ("if the surge keeps rising", keeps_rising)):
        print(f"  {label:27s}" + " ".join(f"{frame.loc[(lead, 'storm'), 'error']:.3f}" for lead in LEADS))
    storm_old = np.mean([old.loc[(lead, "storm"), "coverage"] for lead in LEADS])
    storm_new = np.mean([new.loc[(lead, "storm"), "coverage"] for lead in LEADS])
    print(f"\nstorm coverage averaged over 1-12 h: new {storm_new:.1%}, today's {storm_old:.1%} (target 85-95 %)")
    # Not a target: a winter stormier than the history taught (4 storms a month instead of 2.5).
    rough = prepared(coast(seed=20260303, days=2 * 365, storms_per_30_days=4.0, t0=2.40e9))
    rc = cases(rough)
    rl, rcn, rh, _, _ = learnt.ranges(rc["lead_h"].to_numpy(), rc["r"].to_numpy(), rc["rate"].to_numpy(),
                                      rc["tendency"].to_numpy())
    rs = score(rc, rl, rcn, rh)
    print("(not a target) a stormier test winter than the history, storm coverage by lead: new "
          + " ".join(f"{rs.loc[(lead, 'storm'), 'coverage']:.0%}" for lead in LEADS))
    mib, _ = retained_mib(lambda: SurgeForecaster.learn(train["grid"], skew, train["pgrid"], min_storms=20))
    grid_mib, _ = retained_mib(lambda: train["grid"].to_numpy(dtype=np.float32))
    print(f"\nmemory kept by the learnt forecaster (3 years of 10-minute history): {mib * 1024:.1f} KiB; "
          f"the history's residual grid as float32: {grid_mib * 1024:.1f} KiB (ratio {mib / grid_mib:.3f})")
    targets = Targets()
    targets.below("learnt forecaster's memory [MiB]", mib, MEMORY_TARGET_MIB, ".4f")
    print()
    calm_c = prepared(coast(seed=20260404, days=3 * 365, storms_per_30_days=0.45, t0=1.60e9))
    learn_cost([("stormy coast", train, skew),
                ("calm coast", calm_c, pd.DataFrame({"hw_t": calm_c["hw_t"], "skew_surge": calm_c["skew"]}))],
               targets)
    misses += targets.misses
    print(f"total {time.perf_counter() - t_start:.1f} s")
    if misses:
        print("FAIL: " + "; ".join(misses))
        raise TargetMissed("; ".join(misses))
    print("PASS: coverage within 85-95 % at every lead overall and in storms; wide fallback >= 90 % in storms; "
          f"calm width <= {CALM_WIDTH_RATIO} x today's")


if __name__ == "__main__":
    main()
