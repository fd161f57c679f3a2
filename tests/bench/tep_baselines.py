"""Classical process-monitoring baselines for the Tennessee Eastman (TEP) benchmark: PCA and dynamic
PCA with Hotelling's T-squared and Q (squared prediction error) charts. numpy and scipy only.

Sources (named again beside each formula):
- PCA on standardised data, T-squared and Q: Jackson, "A User's Guide to Principal Components",
  Wiley 1991; Chiang, Russell & Braatz, "Fault Detection and Diagnosis in Industrial Systems",
  Springer 2001, chapter 4.
- T-squared limit for a new observation, k (n-1)(n+1) / (n (n-k)) F_{1-alpha}(k, n-k): the same book
  (and Tracy, Young & Mason, J. Quality Technology 24:88-95, 1992, for the full-rank case).
- Q limit: Jackson & Mudholkar, Technometrics 21:341-349, 1979; Box's chi-squared approximation
  g chi^2_h: Box, Annals of Mathematical Statistics 25:290-302, 1954.
- Number of components: cumulative explained variance, or parallel analysis (Horn, Psychometrika
  30:179-185, 1965).
- Dynamic PCA: Ku, Storer & Georgakis, Chemometrics and Intelligent Laboratory Systems 30:179-196,
  1995.

Choices, stated once:
- Default number of components: parallel analysis with Horn's original criterion (keep component
  i while its eigenvalue exceeds the MEAN i-th eigenvalue of same-size i.i.d. normal data; 100
  seeded replicates). Why parallel analysis over "90 % of the variance": on standardised data
  every variable, noise included, brings variance 1, so a variance percentage keeps components
  that only carry noise (31 of 52 on d00.dat against 12) and leaves Q almost nothing but the
  near-exact balances; parallel analysis keeps what stands out of the noise of a sample this size,
  a test with a stated null rather than an arbitrary percentage. The 95th-percentile variant
  (more conservative) is available as pa_statistic="p95". This choice was made before looking at
  any fault file.
- Default lag for dynamic PCA: L = 2. Ku et al. (1995) report that one or two lags suffice for the
  processes they studied, and Russell, Chiang & Braatz (Chemometrics and Intelligent Laboratory
  Systems 51:81-93, 2000) used two lags on these data (both from memory, not re-read). Each lag adds
  52 dimensions for 500 training rows, so more lags cost the covariance estimate precision.
- Lagged models and the first L samples of a file: those samples have no full history inside the
  file, and each file is a separate simulation run (no history may be borrowed from another file),
  so they are NOT scored: their statistics are NaN, their `valid` entry False, and every rate
  counts scored samples only (numerator and denominator). With L = 2 this drops samples 1-2 from
  the false-alarm windows; the detection window (samples 161-960) is unaffected.
"""
import os

import numpy as np
from scipy import stats

N_XMEAS = 41
N_XMV = 11
N_VARIABLES = N_XMEAS + N_XMV
FEATURE_NAMES = (["xmeas_%02d" % i for i in range(1, N_XMEAS + 1)] +
                 ["xmv_%02d" % i for i in range(1, N_XMV + 1)])
FAULT_ONSET = 160  # samples 1-160 of a fault file are normal, 161-960 faulty (data README)
TEST_ROWS = 960
TRAIN_ROWS = 500
FAULTS = tuple(range(1, 22))
HARD_FAULTS = (3, 9, 15)  # commonly reported as practically undetectable (data README)

DEFAULT_ALPHA = 0.01
DEFAULT_LAGS = 2
DEFAULT_VARIANCE_TARGET = 0.90
PA_REPLICATES = 100
PA_SEED = 20240601


# ---------------------------------------------------------------------------------------------
# Reading the files


def read_dat(path, transposed=False, expected_rows=None):
    """Reads a whitespace-separated TEP .dat file into a (samples x 52) float array.

    transposed: the file holds one variable per line (d00.dat is stored that way). Raises
    ValueError naming the file on a wrong shape or a non-finite value.
    """
    try:
        data = np.loadtxt(path, dtype=float, ndmin=2)
    except ValueError as e:
        raise ValueError("%s: not a whitespace-separated table of numbers (%s)" % (path, e))
    if transposed:
        data = data.T
    if data.shape[1] != N_VARIABLES:
        raise ValueError("%s: %d columns after %s, expected %d variables" %
                         (path, data.shape[1], "transposing" if transposed else "reading",
                          N_VARIABLES))
    if expected_rows is not None and data.shape[0] != expected_rows:
        raise ValueError("%s: %d samples, expected %d" % (path, data.shape[0], expected_rows))
    if not np.all(np.isfinite(data)):
        raise ValueError("%s: non-finite values" % path)
    return data


def load_training(data_dir):
    """d00.dat, stored transposed (52 lines of 500 values): returned as 500 x 52."""
    return read_dat(os.path.join(data_dir, "d00.dat"), transposed=True, expected_rows=TRAIN_ROWS)


def load_test(data_dir, fault):
    """d00_te.dat (fault 0) or dNN_te.dat: 960 x 52, one sample per line."""
    return read_dat(os.path.join(data_dir, "d%02d_te.dat" % fault), expected_rows=TEST_ROWS)


# ---------------------------------------------------------------------------------------------
# Control limits


def t2_limit(k, n, alpha=DEFAULT_ALPHA):
    """Hotelling's T-squared limit for a NEW observation, model fitted on n samples with k
    components: k (n-1)(n+1) / (n (n-k)) F_{1-alpha}(k, n-k) (Chiang, Russell & Braatz 2001,
    chapter 4; exact for Gaussian data when k is the number of variables, Tracy, Young & Mason
    1992)."""
    if not (1 <= k < n):
        raise ValueError("t2_limit: need 1 <= k < n, got k=%d n=%d" % (k, n))
    return k * (n - 1) * (n + 1) / (n * (n - k)) * stats.f.ppf(1 - alpha, k, n - k)


def _thetas(residual_eigenvalues):
    lam = np.asarray(residual_eigenvalues, dtype=float)
    if lam.size == 0 or np.any(lam < 0) or not np.any(lam > 0):
        raise ValueError("Q limit: need non-negative residual eigenvalues, not all zero")
    return lam.sum(), (lam ** 2).sum(), (lam ** 3).sum()


def q_limit_jackson_mudholkar(residual_eigenvalues, alpha=DEFAULT_ALPHA):
    """Jackson & Mudholkar (1979): theta_i = sum lambda_j^i over the residual eigenvalues,
    h0 = 1 - 2 theta1 theta3 / (3 theta2^2),
    Q_alpha = theta1 [c_alpha sqrt(2 theta2 h0^2) / theta1 + 1 + theta2 h0 (h0 - 1) / theta1^2]^(1/h0)
    with c_alpha the standard normal (1 - alpha) quantile."""
    theta1, theta2, theta3 = _thetas(residual_eigenvalues)
    h0 = 1.0 - 2.0 * theta1 * theta3 / (3.0 * theta2 ** 2)
    c = stats.norm.ppf(1 - alpha)
    base = c * np.sqrt(2.0 * theta2 * h0 ** 2) / theta1 + 1.0 + theta2 * h0 * (h0 - 1.0) / theta1 ** 2
    return theta1 * base ** (1.0 / h0)


def q_limit_box(residual_eigenvalues, alpha=DEFAULT_ALPHA):
    """Box (1954): Q is approximately g chi^2_h with g = theta2 / theta1, h = theta1^2 / theta2
    (matches the first two moments of sum lambda_j z_j^2)."""
    theta1, theta2, _ = _thetas(residual_eigenvalues)
    g = theta2 / theta1
    h = theta1 ** 2 / theta2
    return g * stats.chi2.ppf(1 - alpha, h)


# ---------------------------------------------------------------------------------------------
# Number of components


def cumulative_variance_components(eigenvalues, target=DEFAULT_VARIANCE_TARGET):
    """Smallest k whose leading eigenvalues explain at least `target` of the total variance."""
    lam = np.asarray(eigenvalues, dtype=float)
    share = np.cumsum(lam) / lam.sum()
    return int(np.searchsorted(share, target - 1e-12) + 1)


def parallel_analysis_reference(n, p, statistic="mean", replicates=PA_REPLICATES, seed=PA_SEED):
    """Reference eigenvalues for parallel analysis (Horn 1965): the eigenvalues of the correlation
    matrix of n x p i.i.d. standard normal data, standardised the same way as the data (mean and
    sample standard deviation), over `replicates` seeded draws; their mean (Horn's criterion) or
    95th percentile (statistic="p95")."""
    if statistic not in ("mean", "p95"):
        raise ValueError("parallel analysis statistic must be 'mean' or 'p95', got %r" % statistic)
    rng = np.random.default_rng(seed)
    draws = np.empty((replicates, p))
    for r in range(replicates):
        x = rng.standard_normal((n, p))
        x = (x - x.mean(axis=0)) / x.std(axis=0, ddof=1)
        draws[r] = np.linalg.eigvalsh(x.T @ x / (n - 1))[::-1]
    return draws.mean(axis=0) if statistic == "mean" else np.percentile(draws, 95, axis=0)


def parallel_analysis_components(eigenvalues, n, statistic="mean", replicates=PA_REPLICATES,
                                 seed=PA_SEED):
    """Keeps components 1, 2, ... while each eigenvalue exceeds its reference (stops at the first
    that does not); at least one."""
    lam = np.asarray(eigenvalues, dtype=float)
    ref = parallel_analysis_reference(n, lam.size, statistic, replicates, seed)
    below = np.nonzero(lam <= ref)[0]
    k = int(below[0]) if below.size else lam.size
    return max(k, 1)


# ---------------------------------------------------------------------------------------------
# Lags


def lag_augment(x, lags):
    """Dynamic PCA's augmented matrix (Ku et al. 1995): row t is [x_t, x_{t-1}, ..., x_{t-L}], for
    t = L .. n-1 (rows without a full history inside x are dropped: n - L rows)."""
    x = np.asarray(x, dtype=float)
    if lags < 0:
        raise ValueError("lags must be >= 0, got %d" % lags)
    n = x.shape[0]
    if n <= lags:
        raise ValueError("lag_augment: %d samples cannot fill a history of %d lags" % (n, lags))
    return np.hstack([x[lags - j:n - j] for j in range(lags + 1)])


# ---------------------------------------------------------------------------------------------
# The monitor


class PcaMonitor:
    """PCA (lags = 0) or dynamic PCA (lags = L > 0) with T-squared and Q charts.

    fit(train): train is (n x p) in time order. Standardises (after augmenting, as dynamic PCA
    does) with the training mean and sample standard deviation, takes the eigen-decomposition
    of the correlation matrix, chooses k (k_rule = "parallel" | "variance" | an int) and sets the
    limits at 1 - alpha: T-squared by the F formula, Q by Jackson & Mudholkar (q_limit) and by
    Box (q_limit_box). If k equals the dimension there is no residual space: Q is 0 and its limits
    are +inf (never flags).
    """

    def __init__(self, lags=0, k_rule="parallel", alpha=DEFAULT_ALPHA,
                 variance_target=DEFAULT_VARIANCE_TARGET, pa_statistic="mean", pa_seed=PA_SEED):
        self.lags = int(lags)
        self.k_rule = k_rule
        self.alpha = alpha
        self.variance_target = variance_target
        self.pa_statistic = pa_statistic
        self.pa_seed = pa_seed

    def fit(self, train):
        train = np.asarray(train, dtype=float)
        if train.ndim != 2 or not np.all(np.isfinite(train)):
            raise ValueError("fit: need a finite 2-D array, got shape %s" % (train.shape,))
        z = lag_augment(train, self.lags)
        n, p = z.shape
        if n < 3:
            raise ValueError("fit: %d rows after lagging are too few" % n)
        self.mean_ = z.mean(axis=0)
        self.scale_ = z.std(axis=0, ddof=1)
        constant = np.nonzero(self.scale_ <= 0)[0]
        if constant.size:
            raise ValueError("fit: constant training column(s) %s cannot be standardised" %
                             constant.tolist())
        zs = (z - self.mean_) / self.scale_
        eigenvalues, vectors = np.linalg.eigh(zs.T @ zs / (n - 1))
        order = np.argsort(eigenvalues)[::-1]
        # Round-off can leave tiny negative eigenvalues on near-collinear data (TEP has some).
        self.eigenvalues_ = np.clip(eigenvalues[order], 0.0, None)
        vectors = vectors[:, order]
        if self.k_rule == "parallel":
            k = parallel_analysis_components(self.eigenvalues_, n, self.pa_statistic,
                                             seed=self.pa_seed)
        elif self.k_rule == "variance":
            k = cumulative_variance_components(self.eigenvalues_, self.variance_target)
        elif isinstance(self.k_rule, (int, np.integer)):
            k = int(self.k_rule)
        else:
            raise ValueError("k_rule must be 'parallel', 'variance' or an int, got %r" %
                             (self.k_rule,))
        if not (1 <= k <= p) or k >= n:
            raise ValueError("fit: k=%d outside 1..min(p=%d, n-1=%d)" % (k, p, n - 1))
        if self.eigenvalues_[k - 1] <= 0:
            raise ValueError("fit: component %d has zero variance; choose fewer" % k)
        self.n_ = n
        self.k_ = k
        self.loadings_ = vectors[:, :k]
        self.t2_limit_ = t2_limit(k, n, self.alpha)
        residual = self.eigenvalues_[k:]
        if residual.size and np.any(residual > 0):
            self.q_limit_ = q_limit_jackson_mudholkar(residual, self.alpha)
            self.q_limit_box_ = q_limit_box(residual, self.alpha)
        else:
            self.q_limit_ = self.q_limit_box_ = np.inf
        return self

    def statistics(self, x):
        """T-squared and Q of every sample of x (time order). Returns (t2, q, valid): the first
        `lags` samples have no full history inside x, so they are NaN with valid False."""
        x = np.asarray(x, dtype=float)
        if x.ndim != 2 or x.shape[1] * (self.lags + 1) != self.mean_.size:
            raise ValueError("statistics: expected %d columns, got shape %s" %
                             (self.mean_.size // (self.lags + 1), x.shape))
        zs = (lag_augment(x, self.lags) - self.mean_) / self.scale_
        scores = zs @ self.loadings_
        t2 = np.full(x.shape[0], np.nan)
        q = np.full(x.shape[0], np.nan)
        t2[self.lags:] = np.sum(scores ** 2 / self.eigenvalues_[:self.k_], axis=1)
        residual = zs - scores @ self.loadings_.T
        q[self.lags:] = np.sum(residual ** 2, axis=1)
        valid = np.zeros(x.shape[0], dtype=bool)
        valid[self.lags:] = True
        return t2, q, valid

    def flags(self, x, q_limit="jackson_mudholkar"):
        """Per-sample alarms at the nominal limits: {"t2", "q", "t2_or_q", "valid"}; invalid
        (unscored) samples are False everywhere."""
        t2, q, valid = self.statistics(x)
        limit = {"jackson_mudholkar": self.q_limit_, "box": self.q_limit_box_}[q_limit]
        f_t2 = valid & (np.nan_to_num(t2) > self.t2_limit_)
        f_q = valid & (np.nan_to_num(q) > limit)
        return {"t2": f_t2, "q": f_q, "t2_or_q": f_t2 | f_q, "valid": valid}


# ---------------------------------------------------------------------------------------------
# Rates


def flagged_fraction(flags, valid, start=0, stop=None):
    """Fraction of the scored samples in [start, stop) (0-based) that are flagged."""
    flags = np.asarray(flags, dtype=bool)[start:stop]
    valid = np.asarray(valid, dtype=bool)[start:stop]
    if not np.any(valid):
        raise ValueError("no scored sample in [%d, %s)" % (start, stop))
    if np.any(flags & ~valid):
        raise ValueError("an unscored sample is flagged")
    return float(np.count_nonzero(flags) / np.count_nonzero(valid))


def fault_rates(flags, valid, onset=FAULT_ONSET):
    """For one fault file: detection rate (flagged fraction of samples onset+1 .. end, 1-based:
    161-960) and false-alarm rate (flagged fraction of samples 1 .. onset), scored samples only."""
    return {"detection": flagged_fraction(flags, valid, onset, None),
            "false_alarm": flagged_fraction(flags, valid, 0, onset)}


def threshold_at_rate(statistic, valid, rate, higher_is_stranger=True):
    """A threshold on `statistic` that flags round(rate * scored) of the scored samples (the
    strangest ones; ties may flag a few more or fewer). Use: `stranger_than(s, threshold)`."""
    s = np.asarray(statistic, dtype=float)[np.asarray(valid, dtype=bool)]
    if s.size == 0:
        raise ValueError("threshold_at_rate: no scored sample")
    m = int(round(rate * s.size))
    ordered = np.sort(s if higher_is_stranger else -s)
    # Flag values strictly beyond the (size - m)-th smallest: exactly m without ties.
    cut = ordered[s.size - m - 1] if m < s.size else -np.inf
    return cut if higher_is_stranger else -cut


def stranger_than(statistic, valid, threshold, higher_is_stranger=True):
    s = np.asarray(statistic, dtype=float)
    valid = np.asarray(valid, dtype=bool)
    with np.errstate(invalid="ignore"):
        beyond = s > threshold if higher_is_stranger else s < threshold
    return valid & np.nan_to_num(beyond, nan=0).astype(bool)


def average(rates, faults, exclude=HARD_FAULTS):
    """Mean of rates[f] over the faults not in `exclude`."""
    kept = [rates[f] for f in faults if f not in exclude]
    return float(np.mean(kept))
