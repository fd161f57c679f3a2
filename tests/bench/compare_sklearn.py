#!/usr/bin/python3
"""nuwatch against scikit-learn's OneClassSVM on the same problem, in the same run.

Usage: tests/bench/compare_sklearn.py [--nuwatch build/bin/nuwatch] [--native BIN]
                                      [--n 5000] [--dims 16] [--nu 0.05] [--window 2000]
                                      [--score-rows 200000]

Prints a table of timings and ratios, each timing the best of 3 runs (these machines are shared
and noisy: quote ratios).
- cold fit: nuwatch fit's solver time (on the CSV of the data) and `nuwatch bench`'s whole cold fit,
  against OneClassSVM.fit on the same standardised data, the same gamma and tolerance; the decision
  values of both fits are compared (ours times nu l against decision_function).
- batch scoring: `nuwatch bench` throughput at scikit-learn's number of support vectors against
  decision_function on 20000 vectors (single-threaded on both sides).
- warm refit and compression (`nuwatch bench` on a window of --window vectors).
- whole process: `nuwatch fit` on the n x d CSV file against OneClassSVM.fit on the array in
  memory, and `nuwatch score` on a --score-rows x d CSV file (reading it, writing
  decision,p_value,anomaly per row) against decision_function on the array in memory. `nuwatch fit`
  calibrates (cross-fitted models) and may whiten by default; here it is told to do scikit-learn's
  job and no more: --scaler standard --calibration-folds 0 --gamma G (the same gamma; the data are
  standardised already, so the scaler changes nothing but is applied as in production). Wall time
  and CPU time (user + system) of the process, best of 3; scikit-learn's likewise
  (time.perf_counter, time.process_time). `nuwatch score` parses the next blocks of the CSV on a
  second thread while it scores, so its wall time is below its CPU time; decision_function is
  single-threaded. Both ratios are printed.
Needs Debian's python3-sklearn (run with /usr/bin/python3).
"""
import argparse
import json
import os
import resource
import subprocess
import tempfile
import time

import numpy as np
from sklearn.svm import OneClassSVM


REPEAT = 3  # every timing is the best of this many runs: the machines are shared and noisy


def bench(binary, dims, window, nu, budget):
    """`nuwatch bench --json`, best of REPEAT runs for every timing."""
    runs = []
    for _ in range(REPEAT):
        out = subprocess.run([binary, "bench", "--json", "--dims", str(dims), "--window",
                              str(window), "--nu", str(nu), "--support-vector-budget", str(budget)],
                             check=True, capture_output=True, text=True).stdout
        runs.append(json.loads(out))
    best = dict(runs[0])
    for key in best:
        if key.endswith("_seconds"):
            best[key] = min(r[key] for r in runs)
        elif key.endswith("_per_second"):
            best[key] = max(r[key] for r in runs)
    return best


def child_cpu():
    usage = resource.getrusage(resource.RUSAGE_CHILDREN)
    return usage.ru_utime + usage.ru_stime


def run_timed(command):
    """Best wall and CPU seconds of REPEAT runs of a program."""
    wall, cpu = float("inf"), float("inf")
    for _ in range(REPEAT):
        cpu_before = child_cpu()
        started = time.perf_counter()
        subprocess.run(command, check=True, capture_output=True)
        wall = min(wall, time.perf_counter() - started)
        cpu = min(cpu, child_cpu() - cpu_before)
    return wall, cpu


def timed_in_process(action):
    """Best wall and CPU seconds of REPEAT calls."""
    wall, cpu = float("inf"), float("inf")
    for _ in range(REPEAT):
        cpu_before = time.process_time()
        started = time.perf_counter()
        action()
        wall = min(wall, time.perf_counter() - started)
        cpu = min(cpu, time.process_time() - cpu_before)
    return wall, cpu


def main():
    p = argparse.ArgumentParser()
    p.add_argument("--nuwatch", default="build/bin/nuwatch")
    p.add_argument("--native", default="")
    p.add_argument("--n", type=int, default=5000)
    p.add_argument("--dims", type=int, default=16)
    p.add_argument("--nu", type=float, default=0.05)
    p.add_argument("--window", type=int, default=2000)
    p.add_argument("--tol", type=float, default=1e-3)
    p.add_argument("--score-rows", type=int, default=200000)
    a = p.parse_args()

    rng = np.random.default_rng(1)
    x = rng.normal(size=(a.n, a.dims))
    x = (x - x.mean(0)) / x.std(0)
    gamma = 1.0 / (a.dims * x.var())  # gamma="scale", computed once and given to both
    queries = rng.normal(size=(20000, a.dims))
    score_rows = rng.normal(size=(a.score_rows, a.dims))

    rows = []
    sk_fit = float("inf")
    for _ in range(REPEAT):
        sk = OneClassSVM(nu=a.nu, gamma=gamma, tol=a.tol, cache_size=100)
        started = time.perf_counter()
        sk.fit(x)
        sk_fit = min(sk_fit, time.perf_counter() - started)
    n_sv = len(sk.support_)
    started = time.perf_counter()
    repeats = 0
    while True:
        sk.decision_function(queries)
        repeats += 1
        if time.perf_counter() - started > 1.5:
            break
    sk_rate = repeats * len(queries) / (time.perf_counter() - started)

    with tempfile.TemporaryDirectory() as tmp:
        data = os.path.join(tmp, "x.csv")
        np.savetxt(data, x, delimiter=",", fmt="%.17g",
                   header=",".join("f%d" % j for j in range(a.dims)), comments="")
        model = os.path.join(tmp, "m.nuw")
        info = None
        for _ in range(REPEAT):
            subprocess.run([a.nuwatch, "fit", "--input", data, "--output", model, "--nu",
                            str(a.nu), "--gamma", repr(gamma), "--scaler", "none", "--tolerance",
                            str(a.tol), "--cache-bytes", str(100 << 20), "--calibration-folds", "0"],
                           check=True, capture_output=True)
            run = json.loads(subprocess.run([a.nuwatch, "inspect", model, "--json"], check=True,
                                            capture_output=True, text=True).stdout)
            if info is None or run["fit_seconds"] < info["fit_seconds"]:
                info = run
        scores = subprocess.run([a.nuwatch, "score", "--model", model, "--input", data], check=True,
                                capture_output=True, text=True).stdout.split("\n")[1:]
        ours = np.array([float(line.split(",")[0]) for line in scores if line])

        # Whole processes: the same job on both sides (see the docstring).
        sk_fit_whole = timed_in_process(
            lambda: OneClassSVM(nu=a.nu, gamma=gamma, tol=a.tol, cache_size=100).fit(x))
        fit_command = [a.nuwatch, "fit", "--input", data, "--output", model, "--nu", str(a.nu),
                       "--gamma", repr(gamma), "--scaler", "standard", "--calibration-folds", "0",
                       "--tolerance", str(a.tol), "--cache-bytes", str(100 << 20)]
        nw_fit_whole = run_timed(fit_command)
        big = os.path.join(tmp, "score.csv")
        np.savetxt(big, score_rows, delimiter=",", fmt="%.17g",
                   header=",".join("f%d" % j for j in range(a.dims)), comments="")
        sk_score_whole = timed_in_process(lambda: sk.decision_function(score_rows))
        nw_score_whole = run_timed([a.nuwatch, "score", "--model", model, "--input", big,
                                    "--output", os.path.join(tmp, "scores.csv")])
    theirs = sk.decision_function(x)
    nu_l = a.nu * a.n
    max_diff = float(np.max(np.abs(ours * nu_l - theirs)))

    portable_fit = bench(a.nuwatch, a.dims, a.n, a.nu, n_sv)
    portable_window = bench(a.nuwatch, a.dims, a.window, a.nu, 64)
    native = bench(a.native, a.dims, a.n, a.nu, n_sv) if a.native else None

    print("nuwatch vs scikit-learn %s OneClassSVM: n = %d, d = %d, nu = %g, gamma = %.5g, tol = %g"
          % (__import__("sklearn").__version__, a.n, a.dims, a.nu, gamma, a.tol))
    print("| measure | nuwatch | scikit-learn | ratio |")
    print("| --- | --- | --- | --- |")
    print("| cold fit, solver only (s) | %.4f | %.4f | %.1fx faster |"
          % (info["fit_seconds"], sk_fit, sk_fit / info["fit_seconds"]))
    print("| cold fit with scaling and gamma (s, bench) | %.4f | %.4f | %.1fx faster |"
          % (portable_fit["fit_seconds"], sk_fit, sk_fit / portable_fit["fit_seconds"]))
    print("| support vectors | %d | %d | |" % (info["n_support"], n_sv))
    print("| max abs difference of decision values (sklearn scale) | %.2e | | |" % max_diff)
    print("| batch scoring at %d SVs, portable build (vectors/s) | %.0f | %.0f | %.1fx |"
          % (n_sv, portable_fit["score_vectors_per_second"], sk_rate,
             portable_fit["score_vectors_per_second"] / sk_rate))
    if native:
        print("| batch scoring at %d SVs, native build (vectors/s) | %.0f | %.0f | %.1fx |"
              % (n_sv, native["score_vectors_per_second"], sk_rate,
                 native["score_vectors_per_second"] / sk_rate))
    print("| single vector p50 / p99 at %d SVs (us) | %.2f / %.2f | | |"
          % (n_sv, portable_fit["score_p50_seconds"] * 1e6, portable_fit["score_p99_seconds"] * 1e6))
    w = portable_window
    print("| window %d: cold fit / warm refit after 10%% slide (s) | %.4f / %.4f | | %.1fx faster |"
          % (a.window, w["cold_refit_seconds"], w["refit_seconds"],
             w["cold_refit_seconds"] / w["refit_seconds"]))
    print("| window %d: compress %d -> %d SVs (s) | %.4f | | |"
          % (a.window, w["compressed_from"], w["support_vectors"], w["compress_seconds"]))
    print("| whole process: `nuwatch fit` vs OneClassSVM.fit, %d x %d, wall (s) | %.4f | %.4f | %.1fx |"
          % (a.n, a.dims, nw_fit_whole[0], sk_fit_whole[0], sk_fit_whole[0] / nw_fit_whole[0]))
    print("| whole process: fit, CPU user + system (s) | %.4f | %.4f | %.1fx |"
          % (nw_fit_whole[1], sk_fit_whole[1], sk_fit_whole[1] / nw_fit_whole[1]))
    print("| whole process: `nuwatch score` (CSV in and out) vs decision_function, %d x %d, "
          "wall (s) | %.4f | %.4f | %.1fx |"
          % (a.score_rows, a.dims, nw_score_whole[0], sk_score_whole[0],
             sk_score_whole[0] / nw_score_whole[0]))
    print("| whole process: score, CPU user + system (s) | %.4f | %.4f | %.1fx |"
          % (nw_score_whole[1], sk_score_whole[1], sk_score_whole[1] / nw_score_whole[1]))
    print("| window %d: bytes per stream (limit 1.5 x (l d 8 + B d 4)) | %d (%d) | | |"
          % (a.window, w["stream_bytes"], w["stream_bytes_limit"]))


if __name__ == "__main__":
    main()
