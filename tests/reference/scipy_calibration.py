#!/usr/bin/env python3
"""scipy's answers for the calibration reference tests (Debian python3-scipy, /usr/bin/python3).

  genpareto FILE         maximum-likelihood generalised Pareto fit with location 0 of the values in
                         FILE: prints "shape scale loglik" (scipy.stats.genpareto.fit, floc=0).
  kstest FILE            one-sample Kolmogorov-Smirnov test of the values in FILE against U(0, 1):
                         prints "statistic pvalue" (scipy.stats.kstest).
  binom K N P            two-sided binomial test of K successes in N trials with probability P:
                         prints the p-value (scipy.stats.binomtest).
"""
import sys

import numpy as np
from scipy import stats


def main():
    command = sys.argv[1]
    if command == "genpareto":
        y = np.loadtxt(sys.argv[2])
        shape, _, scale = stats.genpareto.fit(y, floc=0)
        loglik = np.sum(stats.genpareto.logpdf(y, shape, loc=0, scale=scale))
        print("%.17g %.17g %.17g" % (shape, scale, loglik))
    elif command == "kstest":
        p = np.loadtxt(sys.argv[2])
        result = stats.kstest(p, "uniform")
        print("%.17g %.17g" % (result.statistic, result.pvalue))
    elif command == "binom":
        k, n, prob = int(sys.argv[2]), int(sys.argv[3]), float(sys.argv[4])
        print("%.17g" % stats.binomtest(k, n, prob).pvalue)
    else:
        sys.exit("unknown command " + command)


if __name__ == "__main__":
    main()
