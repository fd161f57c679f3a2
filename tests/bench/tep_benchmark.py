#!/usr/bin/python3
"""nuwatch against the classical PCA / dynamic PCA charts on the Tennessee Eastman data, in one run.

Usage: /usr/bin/python3 tests/bench/tep_benchmark.py [--data DIR] [--nuwatch BIN]
           [--nuwatch-args "..."] [--lags 2] [--k-rule parallel|variance|K] [--json]

Protocol (../shared/data/tep/README.md): train on d00.dat only (500 normal samples), set every
threshold without looking at a fault, test on d00_te.dat and d01_te.dat-d21_te.dat (960 samples
each; samples 1-160 normal, 161-960 faulty). Detection rate = flagged fraction of samples 161-960,
false-alarm rate = flagged fraction of d00_te.dat and of samples 1-160 of each fault file.
Faults 3, 9 and 15 are averaged apart (commonly reported as practically undetectable).

Prints:
1. at the nominal 99 % limits: PCA T-squared, Q and "T-squared or Q", the same for dynamic PCA
   (DPCA), and nuwatch's `anomaly` column (fitted with --false-alarm-rate 0.01);
2. at an equal realised false-alarm rate of 1 % on d00_te.dat: each statistic's threshold read off
   d00_te.dat itself (only to compare how well the statistics rank samples, not a usable alarm
   setting) for PCA Q, PCA T-squared, DPCA Q, DPCA T-squared and nuwatch's `decision`;
3. the choice of the number of components (parallel analysis, mean and 95th percentile; 90 %
   cumulative variance) and of the Q limit (Jackson & Mudholkar against Box) side by side.
The baselines are tests/bench/tep_baselines.py (its docstring states the choices and sources).

nuwatch (optional, --nuwatch PATH): the training CSV has a header of feature names (xmeas_01 ..
xmeas_41, xmv_01 .. xmv_11) and one row per sample in time order; the program is run as
  BIN fit --input train.csv --output model.bin --false-alarm-rate 0.01 [--nuwatch-args ...]
  BIN score --model model.bin --input test.csv --output scores.csv
and its scores.csv must have one row per input row with columns decision, p_value and anomaly.
Rows it cannot score yet (a transform still filling its history) have empty decision and p_value
and anomaly 0: they are not scored, and are left out of every rate (numerator and denominator), as
the baselines' lagged models leave out the samples without a full history.
"""
import argparse
import csv
import json
import math
import os
import shlex
import subprocess
import sys
import tempfile
import time

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import tep_baselines as tb  # noqa: E402

REPO_ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
DEFAULT_DATA = os.path.normpath(os.path.join(REPO_ROOT, "..", "shared", "data", "tep"))
NOMINAL_RATE = 0.01
EQUAL_RATE = 0.01
ALL_FILES = (0,) + tb.FAULTS

NOMINAL_COLUMNS = [("pca_t2", "PCA T2"), ("pca_q", "PCA Q"), ("pca_t2_or_q", "PCA T2|Q"),
                   ("dpca_t2", "DPCA T2"), ("dpca_q", "DPCA Q"), ("dpca_t2_or_q", "DPCA T2|Q"),
                   ("nuwatch", "nuwatch")]
EQUAL_COLUMNS = [("pca_q", "PCA Q"), ("pca_t2", "PCA T2"), ("dpca_q", "DPCA Q"),
                 ("dpca_t2", "DPCA T2"), ("nuwatch", "nuwatch")]


def parse_k_rule(text):
    return int(text) if text.isdigit() else text


def summarise(per_file_flags):
    """per_file_flags: {file: (flags, valid)} for every file of ALL_FILES -> the rates."""
    detection, early = {}, {}
    for f in tb.FAULTS:
        flags, valid = per_file_flags[f]
        r = tb.fault_rates(flags, valid)
        detection[f], early[f] = r["detection"], r["false_alarm"]
    flags0, valid0 = per_file_flags[0]
    return {
        "detection": detection,
        "average_detection": tb.average(detection, tb.FAULTS),
        "average_detection_3_9_15": float(np.mean([detection[f] for f in tb.HARD_FAULTS])),
        "false_alarm_d00_te": tb.flagged_fraction(flags0, valid0),
        "false_alarm_samples_1_160": early,
        "false_alarm_samples_1_160_mean": float(np.mean(list(early.values()))),
    }


def at_equal_rate(statistic, valid, higher_is_stranger):
    """statistic, valid: {file: array}. Threshold read off d00_te.dat (file 0) at EQUAL_RATE."""
    threshold = tb.threshold_at_rate(statistic[0], valid[0], EQUAL_RATE, higher_is_stranger)
    result = summarise({f: (tb.stranger_than(statistic[f], valid[f], threshold,
                                             higher_is_stranger), valid[f]) for f in ALL_FILES})
    result["threshold"] = float(threshold)
    return result


def model_summary(model, rule_name):
    return {"lags": model.lags, "k_rule": rule_name, "k": model.k_, "n": model.n_,
            "dimension": int(model.mean_.size), "t2_limit": float(model.t2_limit_),
            "q_limit_jackson_mudholkar": float(model.q_limit_),
            "q_limit_box": float(model.q_limit_box_)}


def rule_name(model, short=False):
    if model.k_rule == "parallel":
        statistic = "mean" if model.pa_statistic == "mean" else "95th percentile"
        if short:
            return "parallel analysis, " + statistic
        return "parallel analysis (%s of %d seeded normal replicates)" % (statistic,
                                                                          tb.PA_REPLICATES)
    if model.k_rule == "variance":
        return "cumulative variance >= %g %%" % (100 * model.variance_target)
    return "fixed k"


def run_baselines(train, tests, lags, k_rule, pa_statistic):
    out = {"models": {}, "nominal": {}, "equal_rate": {}}
    for prefix, model_lags in (("pca", 0), ("dpca", lags)):
        model = tb.PcaMonitor(lags=model_lags, k_rule=k_rule, pa_statistic=pa_statistic)
        model.fit(train)
        out["models"][prefix] = model_summary(model, rule_name(model))
        stats = {f: model.statistics(tests[f]) for f in ALL_FILES}
        flags = {f: model.flags(tests[f]) for f in ALL_FILES}
        for chart in ("t2", "q", "t2_or_q"):
            out["nominal"][prefix + "_" + chart] = summarise(
                {f: (flags[f][chart], flags[f]["valid"]) for f in ALL_FILES})
        valid = {f: stats[f][2] for f in ALL_FILES}
        for index, chart in ((0, "t2"), (1, "q")):
            out["equal_rate"][prefix + "_" + chart] = at_equal_rate(
                {f: stats[f][index] for f in ALL_FILES}, valid, higher_is_stranger=True)
    return out


def compare_rules(train, tests, lags):
    """Both k rules (and parallel analysis' two criteria), both Q limits, for PCA and DPCA."""
    rows = []
    for model_lags in (0, lags):
        for k_rule, pa_statistic in (("parallel", "mean"), ("parallel", "p95"), ("variance", None)):
            model = tb.PcaMonitor(lags=model_lags, k_rule=k_rule,
                                  pa_statistic=pa_statistic or "mean").fit(train)
            row = model_summary(model, rule_name(model, short=True))
            for q_limit in ("jackson_mudholkar", "box"):
                flags = {f: model.flags(tests[f], q_limit=q_limit) for f in ALL_FILES}
                for chart in ("t2", "q", "t2_or_q"):
                    if q_limit == "box" and chart == "t2":
                        continue
                    s = summarise({f: (flags[f][chart], flags[f]["valid"]) for f in ALL_FILES})
                    key = chart if q_limit == "jackson_mudholkar" else chart + "_box"
                    row[key] = {"false_alarm_d00_te": s["false_alarm_d00_te"],
                                "average_detection": s["average_detection"]}
            rows.append(row)
    return rows


# ---------------------------------------------------------------------------------------------
# nuwatch


def write_csv(path, x):
    with open(path, "w", newline="") as f:
        w = csv.writer(f)
        w.writerow(tb.FEATURE_NAMES)
        for row in x:
            w.writerow(["%.10g" % v for v in row])


def run_tool(args):
    proc = subprocess.run(args, capture_output=True, text=True)
    if proc.returncode != 0:
        raise SystemExit("nuwatch failed (exit %d): %s\n%s" %
                         (proc.returncode, " ".join(shlex.quote(a) for a in args),
                          proc.stderr.strip()))
    return proc


def read_scores(path, expected_rows):
    """-> (decision, p_value, anomaly, valid) arrays; unscored rows have NaN decision and p_value,
    valid False. Raises SystemExit on any inconsistency rather than guessing."""
    with open(path, newline="") as f:
        reader = csv.DictReader(f)
        missing = {"decision", "p_value", "anomaly"} - set(reader.fieldnames or [])
        if missing:
            raise SystemExit("%s: missing column(s) %s (has %s)" %
                             (path, sorted(missing), reader.fieldnames))
        rows = list(reader)
    if len(rows) != expected_rows:
        raise SystemExit("%s: %d rows for %d input rows" % (path, len(rows), expected_rows))
    decision = np.full(expected_rows, np.nan)
    p_value = np.full(expected_rows, np.nan)
    anomaly = np.zeros(expected_rows, dtype=bool)
    for i, row in enumerate(rows):
        line = i + 2  # 1-based, after the header
        flag = row["anomaly"].strip()
        if flag not in ("0", "1"):
            raise SystemExit("%s:%d: anomaly %r is not 0 or 1" % (path, line, flag))
        anomaly[i] = flag == "1"
        d, p = row["decision"].strip(), row["p_value"].strip()
        if d == "" and p == "":
            if anomaly[i]:
                raise SystemExit("%s:%d: an unscored row (empty decision) is flagged" % (path, line))
            continue
        try:
            decision[i], p_value[i] = float(d), float(p)
        except ValueError:
            raise SystemExit("%s:%d: decision %r / p_value %r not numbers" % (path, line, d, p))
        if not (math.isfinite(decision[i]) and 0.0 <= p_value[i] <= 1.0):
            raise SystemExit("%s:%d: decision %r / p_value %r out of range" % (path, line, d, p))
    return decision, p_value, anomaly, ~np.isnan(decision)


def run_nuwatch(binary, extra_args, train, tests):
    with tempfile.TemporaryDirectory(prefix="tep-bench-") as tmp:
        train_csv = os.path.join(tmp, "train.csv")
        model = os.path.join(tmp, "model.bin")
        write_csv(train_csv, train)
        fit = run_tool([binary, "fit", "--input", train_csv, "--output", model,
                        "--false-alarm-rate", str(NOMINAL_RATE)] + shlex.split(extra_args))
        decision, anomaly, valid = {}, {}, {}
        for f in ALL_FILES:
            test_csv = os.path.join(tmp, "d%02d_te.csv" % f)
            scores_csv = os.path.join(tmp, "d%02d_scores.csv" % f)
            write_csv(test_csv, tests[f])
            run_tool([binary, "score", "--model", model, "--input", test_csv,
                      "--output", scores_csv])
            decision[f], _, anomaly[f], valid[f] = read_scores(scores_csv, tests[f].shape[0])
            if not np.any(valid[f][tb.FAULT_ONSET:]):
                raise SystemExit("nuwatch scored no sample of d%02d_te.dat after %d" %
                                 (f, tb.FAULT_ONSET))
    nominal = summarise({f: (anomaly[f], valid[f]) for f in ALL_FILES})
    # decision: lower = stranger.
    equal = at_equal_rate(decision, valid, higher_is_stranger=False)
    unscored = {f: int(np.count_nonzero(~valid[f])) for f in ALL_FILES}
    return nominal, equal, unscored, fit.stderr.strip()


# ---------------------------------------------------------------------------------------------
# Output


def fmt(x):
    return "%6.3f" % x if x is not None else "     -"


def table(title, columns, results, file_rate_label):
    width = 10
    lines = [title, "%-34s" % "fault" + "".join("%*s" % (width, name) for _, name in columns)]

    def row(label, getter):
        cells = []
        for key, _ in columns:
            r = results.get(key)
            cells.append("%*s" % (width, fmt(getter(r)) if r is not None else "-"))
        lines.append("%-34s" % label + "".join(cells))

    for f in tb.FAULTS:
        row("%2d%s" % (f, " (hard)" if f in tb.HARD_FAULTS else ""),
            lambda r, f=f: r["detection"][f])
    row("average detection, excl. 3 9 15", lambda r: r["average_detection"])
    row("average detection, 3 9 15", lambda r: r["average_detection_3_9_15"])
    row(file_rate_label, lambda r: r["false_alarm_d00_te"])
    row("false alarms, samples 1-160 (mean)", lambda r: r["false_alarm_samples_1_160_mean"])
    return "\n".join(lines)


def rules_table(rows):
    head = ("%-5s %-34s %4s %4s %7s %7s %7s | %-19s | %-19s | %-19s | %-19s" %
            ("model", "k rule", "k", "dim", "T2 lim", "Q JM", "Q Box", "T2: FA d00_te / det",
             "Q (JM): FA / det", "Q (Box): FA / det", "T2|Q (JM): FA / det"))
    lines = [head]
    for r in rows:
        def pair(key):
            return "%.3f / %.3f" % (r[key]["false_alarm_d00_te"], r[key]["average_detection"])
        lines.append("%-5s %-34s %4d %4d %7.2f %7.2f %7.2f | %-19s | %-19s | %-19s | %-19s" %
                     ("PCA" if r["lags"] == 0 else "DPCA", r["k_rule"], r["k"], r["dimension"],
                      r["t2_limit"], r["q_limit_jackson_mudholkar"], r["q_limit_box"],
                      pair("t2"), pair("q"), pair("q_box"), pair("t2_or_q")))
    return "\n".join(lines)


def main():
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--data", default=DEFAULT_DATA,
                   help="folder with d00.dat, d00_te.dat .. d21_te.dat (default %(default)s)")
    p.add_argument("--nuwatch", default="", help="path to the nuwatch program (column skipped "
                   "when not given)")
    p.add_argument("--nuwatch-args", default="", help="extra arguments for `nuwatch fit`")
    p.add_argument("--lags", type=int, default=tb.DEFAULT_LAGS, help="DPCA lags (default 2)")
    p.add_argument("--k-rule", type=parse_k_rule, default="parallel",
                   help="parallel | variance | a number of components (default parallel)")
    p.add_argument("--pa-statistic", choices=("mean", "p95"), default="mean")
    p.add_argument("--json", action="store_true", help="print JSON instead of tables")
    a = p.parse_args()
    if a.lags < 1:
        p.error("--lags must be at least 1 (lags 0 is the PCA column)")
    if a.nuwatch and not os.access(a.nuwatch, os.X_OK):
        p.error("--nuwatch %s: not an executable file" % a.nuwatch)

    start = time.monotonic()
    try:
        train = tb.load_training(a.data)
        tests = {f: tb.load_test(a.data, f) for f in ALL_FILES}
    except (OSError, ValueError) as e:
        raise SystemExit("tep_benchmark: %s (--data points to the folder of the TEP files)" % e)
    result = run_baselines(train, tests, a.lags, a.k_rule, a.pa_statistic)
    result["k_rules"] = compare_rules(train, tests, a.lags)
    baseline_seconds = time.monotonic() - start

    nuwatch_note = "nuwatch: skipped (give --nuwatch PATH_TO_BINARY to add its column)"
    result["nuwatch"] = None
    if a.nuwatch:
        start = time.monotonic()
        nominal, equal, unscored, fit_log = run_nuwatch(a.nuwatch, a.nuwatch_args, train, tests)
        seconds = time.monotonic() - start
        result["nominal"]["nuwatch"] = nominal
        result["equal_rate"]["nuwatch"] = equal
        result["nuwatch"] = {"binary": a.nuwatch, "fit_args": a.nuwatch_args,
                             "false_alarm_rate": NOMINAL_RATE, "unscored_rows": unscored,
                             "seconds": seconds, "fit_stderr": fit_log}
        nuwatch_note = ("nuwatch: %s fit --false-alarm-rate %g %s; unscored rows per file %s; "
                        "%.1f s" % (a.nuwatch, NOMINAL_RATE, a.nuwatch_args,
                                    sorted(set(unscored.values())), seconds))
    result["data"] = os.path.abspath(a.data)
    result["protocol"] = {"train": "d00.dat (500 samples)", "fault_onset_sample": 160,
                          "detection_window": "samples 161-960",
                          "false_alarm_windows": ["d00_te.dat", "samples 1-160 of each fault"],
                          "hard_faults": list(tb.HARD_FAULTS), "nominal_rate": NOMINAL_RATE,
                          "equal_rate": EQUAL_RATE}
    result["baseline_seconds"] = baseline_seconds

    if a.json:
        json.dump(result, sys.stdout, indent=1, sort_keys=True)
        print()
        return
    m = result["models"]
    print("Tennessee Eastman, data %s: train d00.dat (500 samples), test d00_te.dat and "
          "d01-d21_te.dat" % result["data"])
    for key, label in (("pca", "PCA"), ("dpca", "DPCA")):
        s = m[key]
        print("%-4s lags %d, dimension %d, k = %d by %s, n = %d; limits at 99%%: T2 %.2f, "
              "Q %.2f (Jackson & Mudholkar; Box %.2f)" %
              (label, s["lags"], s["dimension"], s["k"], s["k_rule"], s["n"], s["t2_limit"],
               s["q_limit_jackson_mudholkar"], s["q_limit_box"]))
    print("DPCA: the first %d samples of each file have no full history and are not scored." %
          a.lags)
    print(nuwatch_note)
    print()
    print(table("Detection rate (samples 161-960) at the nominal 99 % limits (nuwatch: anomaly "
                "column at --false-alarm-rate 0.01)", NOMINAL_COLUMNS, result["nominal"],
                "false alarms, d00_te.dat"))
    print()
    print(table("At an equal realised false-alarm rate of 1 % on d00_te.dat (threshold read off "
                "that file, only to compare ranking; nuwatch: decision)", EQUAL_COLUMNS,
                result["equal_rate"], "realised false alarms, d00_te.dat"))
    print()
    print("Choice of k and of the Q limit (nominal 99 %; FA = false alarms on d00_te.dat, det = "
          "average detection excl. 3 9 15)")
    print(rules_table(result["k_rules"]))
    print()
    print("baselines: %.1f s" % baseline_seconds)


if __name__ == "__main__":
    main()
