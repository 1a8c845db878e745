"""Detection quality of leadline, end to end through the Engine, on invented feeds with planted faults.

Run:  python tests/benchmarks/bench_detection.py [--quick]

Each invented family (tests/benchmarks/detection_feeds.py) is one feed of an
:class:`~leadline.detector.engine.Engine` with DEFAULT ``FeedSettings()``
(only the 15-minute flow is given its time zone, Europe/London, as a site
sets it once): it learns, is fitted ("auto" order selection, budget limits of
the default 0.2 false alarms per feed-week), and watches, exactly as in the live service; fits run
inline. The watched feed's checkpoint is restored into a fresh engine for
every trial, so each trial continues the same feed from the end of its
training window (refits during a trial run inline too). Whatever the engine
grows (calendar terms, rules, incidents) shows up here unchanged.

Families: white noise, AR(1), MA(1), ARMA(1,1), ARIMA(1,1,1), ARIMA(0,1,1),
a 15-minute flow with a daily and a weekly cycle on Europe/London time whose
trials cross the 2025-03-30 DST change, a quantized flow parked at a set point
(whole units, sd 0.4), and a tiny-scale vibration feed (mean 0.0268, sd 0.0003).

Faults, in units of the shock sigma, each planted 150-350 readings into a
trial (20-80 on the 15-minute flow, whose default daily refits are dear),
recall window in readings:

    spike        one reading +-7 sigma                     window  8
    level_shift  +-4 sigma from the onset on               window  8
    drift        +-0.15 sigma per step from the onset on   window 48
    flatline     the reading before the onset repeated     window 24
    noise_burst  extra noise, total spread x3, 48 steps    window 24

Measured:

* recall: some event starts within the window after the onset;
* false alarms: event starts on clean readings (before the onsets, and one
  long fault-free run per family), per 1,000 readings;
* events per planted fault: events (distinct (rule, start)) that start
  within the fault's span plus its window; incidents per fault: the same
  count of incidents, an incident being a maximal set of events on the feed
  whose active spans overlap or come within 3 readings of each other;
* alarm duration: a +-4 sigma step lasting 200 readings: the fraction of
  the step's readings during which some event (any rule) is active, and the
  readings after the step ends until every event has cleared;
* the drift ceiling: the Neyman-Pearson bound on any detector's drift recall
  at the false-alarm budget (detection_baselines.py explains it).

Baselines on the same readings: static limits around a fault-free median and
a rolling z-score over the previous 48 readings, each tuned on separate
fault-free data to 0.3 false alarms per 1,000 readings.
"""

from __future__ import annotations

import argparse
import os
import sys
import time

for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    # one BLAS thread, as in the service's fit workers: nested BLAS threads slow small fits down
    os.environ.setdefault(_var, "1")

import numpy as np  # noqa: E402

from detection_baselines import (drift_ceiling, episodes, matched_filter_hit, rolling_scores,  # noqa: E402
                                 static_scores, tune)
from detection_engine import EngineDriver  # noqa: E402
from detection_feeds import (AFTER_ONSET, DRIFT_SIGMA_PER_STEP, FAMILIES, FAULTS, SHIFT_SIGMA,  # noqa: E402
                             Simulator, inject)

from leadline.adapters.replay.scoring import first_start_within  # noqa: E402
from leadline.detector.engine import FeedSettings  # noqa: E402

RATE_PER_1000 = 0.3
RECALL_TARGET = 0.95
EVENTS_PER_FAULT_TARGET = 1.0
STEP_LENGTH = 200
STEP_TAIL = 120
COVERAGE_TARGET = 0.95
CLEAR_TARGET = 10
METHODS = ("leadline", "static", "rolling")


def pct(x: float) -> str:
    return "-" if x != x else f"{100 * x:.1f}%"


def run_family(fam, args) -> dict:
    if fam.costly and args.quick:
        args = argparse.Namespace(**{**vars(args), "trials": args.costly_trials, "step_trials": 1,
                                     "clean": min(args.clean, 400)})
    sim = Simulator(fam)
    seed = 1000 + FAMILIES.index(fam)
    # default settings but the feed's clock: a site sets its time zone once (left at UTC, the 15-minute
    # flow's daily shape is an hour off after the DST change and its CUSUM fires about once a day)
    driver = EngineDriver(FeedSettings(timezone=fam.timezone), fam.interval_s, fam.start)
    learned, hist = driver.learn(sim, np.random.default_rng(seed))

    # baselines: tuned on fault-free continuations with other seeds
    tune_rng = np.random.default_rng(seed + 4000)
    tuning = [sim.readings(sim.run(args.clean // 4, tune_rng, hist)) for _ in range(4)]
    centre = float(np.median(tuning[0]))
    static_limit = tune([static_scores(t, centre) for t in tuning], RATE_PER_1000)
    rolling_limit = tune([rolling_scores(t) for t in tuning], RATE_PER_1000)

    def baseline_starts(y):
        return {"static": episodes(static_scores(y, centre) > static_limit),
                "rolling": episodes(rolling_scores(y) > rolling_limit)}

    r = {"name": fam.name, "note": fam.note, "trials": args.trials, "step_trials": args.step_trials, "model": learned.model, "fit_s": learned.fit_s,
         "learn_n": learned.learn_readings, "static_limit": static_limit, "rolling_limit": rolling_limit,
         "fa": dict.fromkeys(METHODS, 0), "fa_incidents": 0, "clean": 0, "refits": 0, "refit_s": 0.0,
         "found": {m: {k: [] for k in FAULTS} for m in METHODS}, "delays": {k: [] for k in FAULTS},
         "events": {k: [] for k in FAULTS}, "incidents": {k: [] for k in FAULTS},
         "mf": [], "coverage": [], "clear": [], "clear_censored": 0}

    # one long fault-free run
    y = sim.readings(sim.run(args.clean, np.random.default_rng(seed + 6000), hist))
    res, _ = driver.run(y, hist.slot, learned)
    r["fa"]["leadline"] += int(np.sum(res.starts() >= 0))
    r["fa_incidents"] += sum(1 for a, _ in res.incidents() if a >= 0)
    for name, s in baseline_starts(y).items():
        r["fa"][name] += s.size
    r["clean"] += y.size
    r["refits"] += res.refits
    r["refit_s"] += res.refit_s

    ceiling = drift_ceiling(fam.ar, fam.ma, fam.d, DRIFT_SIGMA_PER_STEP, FAULTS["drift"][0], RATE_PER_1000)
    r["ceiling"] = ceiling
    trial_rng = np.random.default_rng(seed + 8000)
    for kind, (window, span) in FAULTS.items():
        for _ in range(args.trials):
            onset = int(trial_rng.integers(*fam.onsets))
            piece = sim.run(onset + AFTER_ONSET, trial_rng, hist)
            y, sign = inject(kind, sim, piece, onset, trial_rng)
            res, _ = driver.run(y, hist.slot, learned)
            r["refits"] += res.refits
            r["refit_s"] += res.refit_s
            starts = res.starts()
            first = first_start_within(starts, onset, onset + window)  # the hit rule of `leadline tune` too
            r["found"]["leadline"][kind].append(first is not None)
            if first is not None:
                r["delays"][kind].append(int(first - onset))
            r["fa"]["leadline"] += int(np.sum((starts >= 0) & (starts < onset)))
            inc_starts = np.array([a for a, _ in res.incidents()], dtype=int)
            r["fa_incidents"] += int(np.sum((inc_starts >= 0) & (inc_starts < onset)))
            end = min(y.size, onset + (span if span is not None else AFTER_ONSET) + window)
            r["events"][kind].append(int(np.sum((starts >= onset) & (starts < end))))
            r["incidents"][kind].append(int(np.sum((inc_starts >= onset) & (inc_starts < end))))
            for name, s in baseline_starts(y).items():
                r["found"][name][kind].append(bool(np.any((s >= onset) & (s < onset + window))))
                r["fa"][name] += int(np.sum(s < onset))
            r["clean"] += onset
            if kind == "drift":
                r["mf"].append(matched_filter_hit(ceiling, piece.shocks[onset:], sign))

    # alarm duration: a step of SHIFT_SIGMA lasting STEP_LENGTH readings
    step_rng = np.random.default_rng(seed + 9000)
    for _ in range(args.step_trials):
        onset = int(step_rng.integers(*fam.onsets))
        piece = sim.run(onset + STEP_LENGTH + STEP_TAIL, step_rng, hist)
        sign = 1.0 if step_rng.random() < 0.5 else -1.0
        extra = np.zeros(piece.x.size)
        extra[onset:onset + STEP_LENGTH] = sign * SHIFT_SIGMA * fam.sigma
        y = sim.readings(piece, extra)
        res, _ = driver.run(y, hist.slot, learned)
        r["refits"] += res.refits
        r["refit_s"] += res.refit_s
        active = res.active()
        r["coverage"].append(float(active[onset:onset + STEP_LENGTH].mean()))
        after = active[onset + STEP_LENGTH:]
        quiet = np.flatnonzero(~after)
        if quiet.size:
            r["clear"].append(int(quiet[0]))
        else:
            r["clear"].append(STEP_TAIL)
            r["clear_censored"] += 1
        starts = res.starts()
        r["fa"]["leadline"] += int(np.sum((starts >= 0) & (starts < onset)))
        inc_starts = np.array([a for a, _ in res.incidents()], dtype=int)
        r["fa_incidents"] += int(np.sum((inc_starts >= 0) & (inc_starts < onset)))
        for name, s in baseline_starts(y).items():
            r["fa"][name] += int(np.sum(s < onset))
        r["clean"] += onset
    return r


def report(results: list[dict], args, elapsed: float) -> None:
    kinds = list(FAULTS)
    print()
    print(f"Detection quality through Engine with default FeedSettings(); baselines tuned to {RATE_PER_1000} "
          "false alarms per 1,000")
    print()
    print("Families:")
    for r in results:
        print(f"  {r['name']:10s} {r['note']}")
        print(f"  {'':10s} {r['trials']} trials per fault, {r['step_trials']} step trials; "
              f"learned {r['learn_n']} readings, model {r['model']}, learn+fit {r['fit_s']:.1f} s; "
              f"refits in trials {r['refits']} ({r['refit_s']:.1f} s); static +-{r['static_limit']:.4g}, "
              f"rolling {r['rolling_limit']:.2f}")

    print()
    head = (f"{'family':10s} {'fault':12s} {'leadline':>8s} {'static':>7s} {'rolling':>7s} {'ceiling':>7s} "
            f"{'events/f':>8s} {'incid/f':>7s} {'med delay':>9s}")
    print("Recall per family and fault kind (window after the onset), events and incidents per planted fault")
    print(head)
    print("-" * len(head))
    for r in results:
        for k in kinds:
            rec = {m: float(np.mean(r["found"][m][k])) for m in METHODS}
            ceil = pct(r["ceiling"]["power"]) if k == "drift" else ""
            med = f"{np.median(r['delays'][k]):.0f}" if r["delays"][k] else "-"
            print(f"{r['name']:10s} {k:12s} {pct(rec['leadline']):>8s} {pct(rec['static']):>7s} "
                  f"{pct(rec['rolling']):>7s} {ceil:>7s} {np.mean(r['events'][k]):8.2f} "
                  f"{np.mean(r['incidents'][k]):7.2f} {med:>9s}")
    print("-" * len(head))
    overall = {}
    for k in kinds:
        rec = {m: float(np.mean([x for r in results for x in r["found"][m][k]])) for m in METHODS}
        overall[k] = rec
        ev = float(np.mean([x for r in results for x in r["events"][k]]))
        inc = float(np.mean([x for r in results for x in r["incidents"][k]]))
        print(f"{'all':10s} {k:12s} {pct(rec['leadline']):>8s} {pct(rec['static']):>7s} {pct(rec['rolling']):>7s} "
              f"{'':>7s} {ev:8.2f} {inc:7.2f}")

    print()
    print("False alarms per 1,000 clean readings (event starts; incidents in brackets)")
    head = f"{'family':10s} {'clean':>7s} {'leadline':>16s} {'static':>7s} {'rolling':>7s}"
    print(head)
    print("-" * len(head))
    tot = dict.fromkeys(METHODS, 0)
    tot_inc, tot_clean = 0, 0
    for r in results:
        rate = {m: r["fa"][m] / r["clean"] * 1000 for m in METHODS}
        inc = r["fa_incidents"] / r["clean"] * 1000
        print(f"{r['name']:10s} {r['clean']:7d} {rate['leadline']:7.3f} ({inc:6.3f}) {rate['static']:7.3f} "
              f"{rate['rolling']:7.3f}")
        for m in METHODS:
            tot[m] += r["fa"][m]
        tot_inc += r["fa_incidents"]
        tot_clean += r["clean"]
    fa_all = {m: tot[m] / tot_clean * 1000 for m in METHODS}
    print("-" * len(head))
    print(f"{'all':10s} {tot_clean:7d} {fa_all['leadline']:7.3f} ({tot_inc / tot_clean * 1000:6.3f}) "
          f"{fa_all['static']:7.3f} {fa_all['rolling']:7.3f}")

    print()
    print(f"Alarm duration: a +-{SHIFT_SIGMA:g} sigma step lasting {STEP_LENGTH} readings")
    head = f"{'family':10s} {'covered (mean)':>14s} {'min':>6s} {'clear: median':>13s} {'p90':>4s} {'not cleared':>11s}"
    print(head)
    print("-" * len(head))
    for r in results:
        print(f"{r['name']:10s} {pct(np.mean(r['coverage'])):>14s} {pct(np.min(r['coverage'])):>6s} "
              f"{np.median(r['clear']):13.0f} {np.percentile(r['clear'], 90):4.0f} "
              f"{r['clear_censored']:>5d}/{len(r['clear']):<5d}")
    cov_all = float(np.mean([x for r in results for x in r["coverage"]]))
    clear_all = [x for r in results for x in r["clear"]]
    print("-" * len(head))
    print(f"{'all':10s} {pct(cov_all):>14s} {'':>6s} {np.median(clear_all):13.0f} {np.percentile(clear_all, 90):4.0f}")

    print()
    print(f"Drift ceiling: Neyman-Pearson recall bound at {RATE_PER_1000} false alarms per 1,000 "
          f"(alpha = rate x window {FAULTS['drift'][0]})")
    head = f"{'family':10s} {'||g||':>6s} {'alpha':>7s} {'z':>5s} {'ceiling':>8s} {'matched filter':>14s} {'leadline':>8s}"
    print(head)
    print("-" * len(head))
    for r in results:
        c = r["ceiling"]
        print(f"{r['name']:10s} {c['snr']:6.2f} {c['alpha']:7.4f} {c['limit']:5.2f} {pct(c['power']):>8s} "
              f"{pct(np.mean(r['mf'])):>14s} {pct(np.mean(r['found']['leadline']['drift'])):>8s}")
    print("(matched filter: the bound's test evaluated on the planted trials' own shocks; the ceiling assumes the true"
          " model, onset and slope known, and is not reachable)")

    print()
    print("Targets")
    head = f"{'target':58s} {'measured':>10s} {'met':>4s}"
    print(head)
    print("-" * len(head))

    def row(text, value, ok):
        print(f"{text:58s} {value:>10s} {'yes' if ok else 'NO':>4s}")

    for k in kinds:
        v = overall[k]["leadline"]
        row(f"recall {k} >= {RECALL_TARGET:.0%} (all families)", pct(v), v >= RECALL_TARGET)
        worst = min(results, key=lambda r: np.mean(r["found"]["leadline"][k]))
        wv = float(np.mean(worst["found"]["leadline"][k]))
        row(f"  worst family: {worst['name']}", pct(wv), wv >= RECALL_TARGET)
    row(f"false alarms <= {RATE_PER_1000} per 1,000 clean (all families)", f"{fa_all['leadline']:.3f}",
        fa_all["leadline"] <= RATE_PER_1000)
    worst = max(results, key=lambda r: r["fa"]["leadline"] / r["clean"])
    wv = worst["fa"]["leadline"] / worst["clean"] * 1000
    row(f"  worst family: {worst['name']}", f"{wv:.3f}", wv <= RATE_PER_1000)
    ev_all = float(np.mean([x for r in results for k in kinds for x in r["events"][k]]))
    inc_all = float(np.mean([x for r in results for k in kinds for x in r["incidents"][k]]))
    ev_worst = max(((r["name"], k, float(np.mean(r["events"][k]))) for r in results for k in kinds), key=lambda t: t[2])
    row(f"events per planted fault <= {EVENTS_PER_FAULT_TARGET:g} (mean)", f"{ev_all:.2f}",
        ev_all <= EVENTS_PER_FAULT_TARGET)
    row(f"  worst: {ev_worst[0]} {ev_worst[1]}", f"{ev_worst[2]:.2f}", ev_worst[2] <= EVENTS_PER_FAULT_TARGET)
    row(f"incidents per planted fault <= {EVENTS_PER_FAULT_TARGET:g} (mean)", f"{inc_all:.2f}",
        inc_all <= EVENTS_PER_FAULT_TARGET)
    row(f"step of {STEP_LENGTH}: covered by an active alarm >= {COVERAGE_TARGET:.0%} (mean)", pct(cov_all),
        cov_all >= COVERAGE_TARGET)
    med_clear = float(np.median(clear_all))
    row(f"step end: readings until all alarms clear <= {CLEAR_TARGET} (median)", f"{med_clear:.0f}",
        med_clear <= CLEAR_TARGET)
    p90 = float(np.percentile(clear_all, 90))
    row(f"  90th percentile", f"{p90:.0f}", p90 <= CLEAR_TARGET)
    print(f"\nelapsed {elapsed:.0f} s")


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--trials", type=int, default=40, help="trials per family and fault kind")
    parser.add_argument("--step-trials", type=int, default=40, help="step (alarm duration) trials per family")
    parser.add_argument("--clean", type=int, default=20_000, help="fault-free readings per family")
    parser.add_argument("--families", default="", help="comma-separated subset of the families")
    parser.add_argument("--quick", action="store_true",
                        help="8 trials, 6 step trials, 4,000 clean readings; on the 15-minute flow (a refit "
                             "every 96 readings) --costly-trials trials, 1 step trial, 400 clean readings")
    parser.add_argument("--costly-trials", type=int, default=1, help="with --quick: trials on the 15-minute flow")
    args = parser.parse_args(argv)
    if args.quick:
        args.trials, args.step_trials, args.clean = 8, 6, 4_000
    wanted = [f for f in FAMILIES if not args.families or f.name in args.families.split(",")]
    started = time.perf_counter()
    results = []
    for fam in wanted:
        t0 = time.perf_counter()
        results.append(run_family(fam, args))
        print(f"  {fam.name}: {time.perf_counter() - t0:.0f} s", flush=True)
    report(results, args, time.perf_counter() - started)
    return 0


if __name__ == "__main__":
    sys.exit(main())
