#!/usr/bin/python3
"""Reference checks of the classical PCA / dynamic PCA baselines (tests/bench/tep_baselines.py)
against textbook formulas, scikit-learn, Monte Carlo and the Tennessee Eastman data in tests/data/tep.

Run by ctest (label reference) with /usr/bin/python3 (numpy, scipy, scikit-learn from Debian).
Every check names its source; "from memory" marks a fact not re-read for this test, "our
criterion" a bound we chose and justify beside it.
"""
import os
import sys
import unittest

import numpy as np
from scipy import stats
from sklearn.decomposition import PCA

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, os.path.join(HERE, "..", "bench"))
import tep_baselines as tb  # noqa: E402

DATA = os.path.join(HERE, "..", "data", "tep")
ALPHA = 0.01


def binomial_interval(trials, p, confidence=0.999):
    """Two-sided interval for the count of a Binomial(trials, p), as fractions of trials."""
    tail = (1 - confidence) / 2
    low, high = stats.binom.ppf([tail, 1 - tail], trials, p)
    return low / trials, high / trials


def standardise(train, x):
    """Training mean and sample standard deviation (ddof 1), computed here independently."""
    mean, sd = train.mean(axis=0), train.std(axis=0, ddof=1)
    return (x - mean) / sd


class T2LimitTest(unittest.TestCase):
    def test_formula_matches_f_quantile(self):
        # Source: Chiang, Russell & Braatz 2001, ch. 4; Tracy, Young & Mason, J. Quality Technology
        # 24:88-95, 1992: the limit for a new observation is k (n-1)(n+1) / (n (n-k)) F_{0.99}(k, n-k).
        for k, n in ((1, 10), (3, 30), (12, 500), (29, 498), (50, 60)):
            expected = k * (n - 1) * (n + 1) / (n * (n - k)) * stats.f.ppf(0.99, k, n - k)
            self.assertAlmostEqual(tb.t2_limit(k, n, ALPHA), expected, delta=1e-10 * expected)

    def test_large_n_tends_to_chi_squared(self):
        # Source: k F(k, m) -> chi^2_k as m -> infinity (standard distribution theory), an
        # independent route through scipy.stats.chi2 rather than the F quantile.
        for k in (1, 5, 12):
            self.assertAlmostEqual(tb.t2_limit(k, 10 ** 8, ALPHA), stats.chi2.ppf(0.99, k),
                                   delta=1e-3)

    def test_new_samples_exceed_limit_one_percent_of_the_time(self):
        # Source: Tracy, Young & Mason 1992: with all p components kept, T-squared of a new
        # Gaussian observation under a model fitted on n samples is exactly
        # p (n-1)(n+1) / (n (n-p)) F(p, n-p), marginally over training sets. So redraw the
        # training set each replicate and score one new sample: the exceedances are i.i.d.
        # Bernoulli(0.01). n = 30 makes the small-sample factor matter (the chi-squared limit
        # would give several times the rate).
        rng = np.random.default_rng(20240601)
        p, n, replicates = 4, 30, 20000
        root = rng.standard_normal((p, p))
        chol = np.linalg.cholesky(root @ root.T + 0.5 * np.eye(p))  # a known covariance
        centre = np.array([3.0, -1.0, 10.0, 0.0])
        exceed = 0
        for _ in range(replicates):
            x = rng.standard_normal((n + 1, p)) @ chol.T + centre
            model = tb.PcaMonitor(k_rule=p).fit(x[:n])
            t2, _, valid = model.statistics(x[n:])
            self.assertTrue(valid[0])
            exceed += t2[0] > model.t2_limit_
        low, high = binomial_interval(replicates, ALPHA)
        self.assertTrue(low <= exceed / replicates <= high,
                        "rate %.4f outside [%.4f, %.4f]" % (exceed / replicates, low, high))


class QLimitTest(unittest.TestCase):
    @classmethod
    def setUpClass(cls):
        train = tb.load_training(DATA)
        pca = tb.PcaMonitor().fit(train)
        dpca = tb.PcaMonitor(lags=2).fit(train)
        # Typical residual spectra: the TEP models' own, and a slowly decaying one.
        cls.spectra = {"TEP PCA": pca.eigenvalues_[pca.k_:],
                       "TEP DPCA": dpca.eigenvalues_[dpca.k_:],
                       "linear 1 to 0.05": np.linspace(1.0, 0.05, 20)}

    def monte_carlo_quantile(self, lam, draws=200000, seed=11):
        # Q of Gaussian data with residual eigenvalues lambda_j is exactly sum_j lambda_j z_j^2
        # (Jackson & Mudholkar 1979, section 2): its 99 % quantile by simulation.
        rng = np.random.default_rng(seed)
        q = np.concatenate([(rng.standard_normal((20000, lam.size)) ** 2) @ lam
                            for _ in range(draws // 20000)])
        return np.quantile(q, 0.99)

    def test_jackson_mudholkar_agrees_with_box(self):
        # Source: both approximate the distribution of sum lambda_j z_j^2 (Jackson & Mudholkar
        # 1979; Box 1954): for spectra without one or two dominant eigenvalues they agree to a
        # few per cent at 99 % (measured here: under 2 %).
        for name, lam in self.spectra.items():
            jm, box = tb.q_limit_jackson_mudholkar(lam, ALPHA), tb.q_limit_box(lam, ALPHA)
            self.assertLess(abs(jm / box - 1), 0.02, name)

    def test_jackson_mudholkar_matches_monte_carlo(self):
        # Source: the exact distribution above, simulated (200000 draws: the quantile's relative
        # standard error is about 0.3 %; bound 1.5 % is our criterion).
        for name, lam in self.spectra.items():
            mc = self.monte_carlo_quantile(lam)
            self.assertLess(abs(tb.q_limit_jackson_mudholkar(lam, ALPHA) / mc - 1), 0.015, name)
            self.assertLess(abs(tb.q_limit_box(lam, ALPHA) / mc - 1), 0.015, name)

    def test_equal_eigenvalues(self):
        # Source: with m equal eigenvalues lambda, Q / lambda is exactly chi^2_m, so Box's
        # g chi^2_h (g = lambda, h = m) is exact; Jackson & Mudholkar's h0 is then 1/3, the
        # Wilson-Hilferty cube-root approximation (Wilson & Hilferty, PNAS 17:684-688, 1931,
        # from memory), good to well under 1 % at m = 8.
        lam = np.full(8, 2.5)
        exact = 2.5 * stats.chi2.ppf(0.99, 8)
        self.assertAlmostEqual(tb.q_limit_box(lam, ALPHA), exact, delta=1e-9 * exact)
        self.assertLess(abs(tb.q_limit_jackson_mudholkar(lam, ALPHA) / exact - 1), 0.005)

    def test_bad_spectra_are_refused(self):
        for lam in (np.array([]), np.zeros(3), np.array([1.0, -0.5])):
            with self.assertRaises(ValueError):
                tb.q_limit_jackson_mudholkar(lam)


class PcaAgainstScikitLearnTest(unittest.TestCase):
    @classmethod
    def setUpClass(cls):
        cls.train = tb.load_training(DATA)
        cls.test = tb.load_test(DATA, 0)

    def test_d00_is_read_transposed(self):
        # Source: the data README: d00.dat holds one variable per line (52 lines of 500 values).
        with open(os.path.join(DATA, "d00.dat")) as f:
            lines = [line.split() for line in f if line.strip()]
        self.assertEqual((len(lines), len(lines[0])), (52, 500))
        self.assertEqual(self.train.shape, (500, 52))
        self.assertEqual(self.train[0, 0], float(lines[0][0]))
        self.assertEqual(self.train[499, 51], float(lines[51][499]))
        self.assertEqual(self.train[7, 3], float(lines[3][7]))

    def test_eigenvalues_and_statistics_match_scikit_learn(self):
        # Source: scikit-learn's PCA (explained_variance_ uses the n-1 divisor) on the data
        # standardised with the training mean and sample standard deviation.
        model = tb.PcaMonitor().fit(self.train)
        k = model.k_
        reference = PCA(n_components=k, svd_solver="full").fit(standardise(self.train,
                                                                          self.train))
        full = PCA(svd_solver="full").fit(standardise(self.train, self.train))
        np.testing.assert_allclose(model.eigenvalues_[:45], full.explained_variance_[:45],
                                   rtol=1e-8)
        z = standardise(self.train, self.test)
        scores = reference.transform(z)
        t2_ref = np.sum(scores ** 2 / reference.explained_variance_, axis=1)
        q_ref = np.sum((z - reference.inverse_transform(scores)) ** 2, axis=1)
        t2, q, valid = model.statistics(self.test)
        self.assertTrue(np.all(valid))
        np.testing.assert_allclose(t2, t2_ref, rtol=1e-8)
        np.testing.assert_allclose(q, q_ref, rtol=1e-7)

    def test_variance_rule_matches_scikit_learn(self):
        # Source: scikit-learn's PCA(n_components=0.9) keeps the fewest components whose
        # cumulative explained variance exceeds 90 %.
        model = tb.PcaMonitor(k_rule="variance").fit(self.train)
        reference = PCA(n_components=0.9, svd_solver="full").fit(
            standardise(self.train, self.train))
        self.assertEqual(model.k_, reference.n_components_)

    def test_parallel_analysis_finds_planted_factors(self):
        # Source: Horn 1965: components of pure noise stay below the noise reference; planted
        # factors with clearly larger variance stand above it. Three factors in 20 variables.
        rng = np.random.default_rng(5)
        n, p = 500, 20
        loadings = np.zeros((3, p))
        loadings[0, :8], loadings[1, 8:14], loadings[2, 14:] = 1.0, 1.0, 1.0
        x = rng.standard_normal((n, 3)) @ loadings + 0.7 * rng.standard_normal((n, p))
        for statistic in ("mean", "p95"):
            model = tb.PcaMonitor(k_rule="parallel", pa_statistic=statistic).fit(x)
            self.assertEqual(model.k_, 3, statistic)
        noise = tb.PcaMonitor(k_rule="parallel", pa_statistic="p95").fit(
            rng.standard_normal((n, p)))
        self.assertLessEqual(noise.k_, 2)

    def test_in_sample_means(self):
        # Source: algebra: with S = Z'Z/(n-1), the kept scores satisfy sum_t t_i^2 = (n-1)
        # lambda_i, so the training mean of T-squared is k (n-1)/n and of Q is theta1 (n-1)/n.
        for lags in (0, 2):
            model = tb.PcaMonitor(lags=lags).fit(self.train)
            t2, q, valid = model.statistics(self.train)
            n = model.n_
            self.assertEqual(np.count_nonzero(valid), n)
            self.assertAlmostEqual(t2[valid].mean(), model.k_ * (n - 1) / n, places=8)
            theta1 = model.eigenvalues_[model.k_:].sum()
            self.assertAlmostEqual(q[valid].mean(), theta1 * (n - 1) / n, places=8)

    def test_dynamic_pca_is_pca_of_the_lagged_matrix(self):
        # Source: Ku, Storer & Georgakis 1995: DPCA is PCA of rows [x_t, x_{t-1}, ..., x_{t-L}].
        # Built here by an explicit loop, independently of lag_augment.
        lags = 2

        def lagged(x):
            return np.array([np.concatenate([x[t - j] for j in range(lags + 1)])
                             for t in range(lags, len(x))])

        dpca = tb.PcaMonitor(lags=lags, k_rule=20).fit(self.train)
        plain = tb.PcaMonitor(lags=0, k_rule=20).fit(lagged(self.train))
        t2, q, valid = dpca.statistics(self.test)
        t2_ref, q_ref, _ = plain.statistics(lagged(self.test))
        self.assertFalse(np.any(valid[:lags]))
        self.assertTrue(np.all(np.isnan(t2[:lags])))
        np.testing.assert_allclose(t2[lags:], t2_ref, rtol=1e-8)
        np.testing.assert_allclose(q[lags:], q_ref, rtol=1e-8)
        flags = dpca.flags(self.test)
        self.assertFalse(np.any(flags["t2_or_q"][:lags]))

    def test_bad_input_is_refused(self):
        with self.assertRaises(ValueError):
            tb.PcaMonitor().fit(np.hstack([self.train, np.ones((500, 1))]))  # constant column
        bad = self.train.copy()
        bad[3, 4] = np.nan
        with self.assertRaises(ValueError):
            tb.PcaMonitor().fit(bad)
        with self.assertRaises(ValueError):
            tb.PcaMonitor().fit(self.train).statistics(self.test[:, :51])
        with self.assertRaises(ValueError):
            tb.read_dat(os.path.join(DATA, "d00.dat"))  # not transposed: 500 columns


class TennesseeEastmanTest(unittest.TestCase):
    """The baselines on the copied TEP files. Expectations rest on properties of the data that do
    not depend on PCA (checked first, as premises), plus the charts' division of labour: T-squared
    watches variation inside the model plane, Q departures from it (Chiang, Russell & Braatz 2001,
    ch. 4; common practice)."""

    @classmethod
    def setUpClass(cls):
        cls.train = tb.load_training(DATA)
        cls.files = {f: tb.load_test(DATA, f) for f in (0, 1, 3, 4, 5)}
        cls.models = {"PCA": tb.PcaMonitor().fit(cls.train),
                      "DPCA": tb.PcaMonitor(lags=2).fit(cls.train)}
        cls.flags = {name: {f: m.flags(x) for f, x in cls.files.items()}
                     for name, m in cls.models.items()}

    def fraction(self, name, fault, chart, start=tb.FAULT_ONSET, stop=None):
        fl = self.flags[name][fault]
        return tb.flagged_fraction(fl[chart], fl["valid"], start, stop)

    def z(self, fault):
        return standardise(self.train, self.files[fault])

    def t2_false_alarm_band(self, name):
        # Realised rate of 960 autocorrelated samples at nominal 1 %: binomial at the effective
        # sample size n (1 - rho) / (1 + rho) of an AR(1) series (common practice; rho = lag-1
        # autocorrelation of T-squared on d00_te, which bounds the exceedance indicator's).
        t2, _, valid = self.models[name].statistics(self.files[0])
        t2 = t2[valid]
        rho = np.corrcoef(t2[1:], t2[:-1])[0, 1]
        n_eff = int(t2.size * (1 - rho) / (1 + rho))
        return binomial_interval(n_eff, ALPHA)

    def test_t2_false_alarm_rate_is_near_nominal(self):
        # Source: the F limit is set for 1 % on normal data (above); d00_te.dat is normal
        # operation (data README). Samples 1-160 of the fault files are normal too.
        for name in self.models:
            low, high = self.t2_false_alarm_band(name)
            rate = self.fraction(name, 0, "t2", 0)
            self.assertTrue(low <= rate <= high, "%s %.4f not in [%.4f, %.4f]" %
                            (name, rate, low, high))
            early = np.mean([self.fraction(name, f, "t2", 0, tb.FAULT_ONSET)
                             for f in (1, 3, 4, 5)])
            self.assertLessEqual(early, high, name)

    def test_fault_1_every_chart_detects(self):
        # Premise (data): fault 1 moves at least five variables by more than 3 training
        # standard deviations on average over samples 161-960.
        shift = np.abs(self.z(1)[tb.FAULT_ONSET:].mean(axis=0))
        self.assertGreaterEqual(np.count_nonzero(shift > 3), 5)
        # Expectation: a shift that large is caught by both charts (Chiang, Russell & Braatz 2001
        # report about 99 % for PCA and DPCA; from memory).
        for name in self.models:
            for chart in ("t2", "q", "t2_or_q"):
                self.assertGreater(self.fraction(name, 1, chart), 0.9, (name, chart))

    def test_fault_4_q_detects_t2_hardly(self):
        # Premise (data): fault 4 moves XMV 10 alone (> 3 sd; every other variable < 0.5 sd),
        # although XMV 10 moves with XMEAS 9 in the training data (|r| > 0.5): the fault breaks
        # a correlation of normal operation instead of moving along one.
        shift = np.abs(self.z(4)[tb.FAULT_ONSET:].mean(axis=0))
        xmv10, xmeas9 = tb.FEATURE_NAMES.index("xmv_10"), tb.FEATURE_NAMES.index("xmeas_09")
        self.assertGreater(shift[xmv10], 3)
        self.assertLess(np.delete(shift, xmv10).max(), 0.5)
        self.assertGreater(abs(np.corrcoef(self.train[:, xmv10], self.train[:, xmeas9])[0, 1]),
                           0.5)
        # Expectation: Q sees a broken correlation, T-squared does not (the division of labour
        # above; Chiang, Russell & Braatz 2001 report this contrast for fault 4, from memory).
        for name in self.models:
            self.assertGreater(self.fraction(name, 4, "q"), 0.9, name)
            self.assertLess(self.fraction(name, 4, "t2"), 0.3, name)

    def test_fault_5_is_compensated_by_the_controllers(self):
        # Premise (data): the root-mean-square standardised deviation of all variables but
        # XMV 11 (the condenser cooling water flow, which absorbs the step) is above 3 in samples
        # 161-360 and back under 1.5 in samples 561-960, the range of d00_te.dat's own windows.
        def rms(fault, start, stop):
            z = np.delete(self.z(fault), tb.FEATURE_NAMES.index("xmv_11"), axis=1)
            return np.sqrt(np.mean(z[start:stop] ** 2))

        self.assertGreater(rms(5, 160, 360), 3)
        self.assertLess(rms(5, 560, 960), 1.5)
        self.assertLess(rms(0, 560, 960), 1.5)
        # Expectation: alarms right after onset, then T-squared back to its false-alarm level
        # (Chiang, Russell & Braatz 2001 describe the control system compensating fault 5 after
        # about 10 hours; from memory, the premise above is what this test rests on).
        for name in self.models:
            _, high = self.t2_false_alarm_band(name)
            self.assertGreater(self.fraction(name, 5, "t2", 160, 360), 0.8, name)
            self.assertGreater(self.fraction(name, 5, "t2_or_q", 160, 360), 0.95, name)
            self.assertLessEqual(self.fraction(name, 5, "t2", 560, 960), high, name)

    def test_fault_3_looks_normal(self):
        # Premise (data): no variable's mean over samples 161-960 moves by 0.5 training sd, and
        # the root-mean-square standardised deviation of every 4-hour window (80 samples) stays
        # within the largest of d00_te.dat's own windows.
        z3 = self.z(3)[tb.FAULT_ONSET:]
        self.assertLess(np.abs(z3.mean(axis=0)).max(), 0.5)

        def worst_window(z):
            return max(np.sqrt(np.mean(z[a:a + 80] ** 2)) for a in range(0, len(z), 80))

        self.assertLessEqual(worst_window(z3), worst_window(self.z(0)))
        # Expectation: detection no better than the normal file's flagged fraction (commonly
        # reported as practically undetectable: data README). Our criterion: T-squared within
        # its false-alarm band, T-squared-or-Q at most 1.5 times its own rate on d00_te.dat
        # (fault 1: above 0.9, see above).
        for name in self.models:
            _, high = self.t2_false_alarm_band(name)
            self.assertLessEqual(self.fraction(name, 3, "t2"), high, name)
            normal = self.fraction(name, 0, "t2_or_q", 0)
            self.assertLessEqual(self.fraction(name, 3, "t2_or_q"), 1.5 * normal, name)

    def test_equal_rate_threshold_flags_one_percent(self):
        # The equal-rate comparison reads its threshold off d00_te.dat: exactly round(1 % of the
        # scored samples) flagged there (no ties in continuous statistics).
        for name, model in self.models.items():
            for index in (0, 1):
                stats_ = model.statistics(self.files[0])
                s, valid = stats_[index], stats_[2]
                for higher in (True, False):
                    signed = s if higher else -s
                    threshold = tb.threshold_at_rate(signed, valid, 0.01, higher)
                    flagged = tb.stranger_than(signed, valid, threshold, higher)
                    self.assertEqual(np.count_nonzero(flagged),
                                     round(0.01 * np.count_nonzero(valid)), (name, index))


if __name__ == "__main__":
    unittest.main(verbosity=2)
