#!/usr/bin/python3
"""Reference fits with scikit-learn's OneClassSVM (LIBSVM inside) for nuwatch's reference tests.

Writes, for one data set and parameter set, plain whitespace-separated text files into --out:
  train.txt, test.txt          the data (rows = vectors), already standardised when --standardise
  decision_train.txt, decision_test.txt   OneClassSVM.decision_function
  support.txt                  indices of the support vectors (OneClassSVM.support_)
  dual_coef.txt                OneClassSVM.dual_coef_ (LIBSVM scaling: each in [0, 1], sum nu*l)
  params.txt                   gamma_used offset rho_prime n_train
Data sets: blobs (two Gaussian clusters, seeded), cube16 (uniform, d = 16), duplicates (blobs with
every row repeated), iris and breast_cancer (real data bundled with scikit-learn, no download).
"""
import argparse
import os

import numpy as np
from sklearn import datasets
from sklearn.preprocessing import StandardScaler
from sklearn.svm import OneClassSVM


def make_data(name, rng):
    if name == "blobs":
        a = rng.normal(0.0, 1.0, size=(150, 3))
        b = rng.normal(4.0, 0.7, size=(100, 3))
        x = np.vstack([a, b])
    elif name == "cube16":
        x = rng.uniform(-1.0, 1.0, size=(400, 16))
    elif name == "duplicates":
        base = rng.normal(0.0, 1.0, size=(60, 2))
        x = np.vstack([base, base])
    elif name == "iris":
        x = datasets.load_iris().data
    elif name == "breast_cancer":
        x = datasets.load_breast_cancer().data
    elif name == "big":
        x = rng.normal(0.0, 1.0, size=(5000, 16))
    else:
        raise SystemExit("unknown data set " + name)
    rng.shuffle(x)
    return x


def main():
    p = argparse.ArgumentParser()
    p.add_argument("--dataset", required=True)
    p.add_argument("--nu", type=float, default=0.1)
    p.add_argument("--kernel", default="rbf")
    p.add_argument("--gamma", default="scale")
    p.add_argument("--degree", type=int, default=3)
    p.add_argument("--coef0", type=float, default=0.0)
    p.add_argument("--tol", type=float, default=1e-7)
    p.add_argument("--seed", type=int, default=7)
    p.add_argument("--out", required=True)
    a = p.parse_args()
    rng = np.random.default_rng(a.seed)
    x = make_data(a.dataset, rng)
    split = int(0.8 * len(x))
    x = StandardScaler().fit_transform(x)
    if a.dataset == "blobs" and a.kernel != "rbf":
        # Centred data puts the origin inside the hull, where the linear and polynomial one-class
        # problems degenerate to w = 0; shifted data keeps them well posed.
        x = x + 3.0
    train, test = x[:split], x[split:]
    gamma = a.gamma if a.gamma in ("scale", "auto") else float(a.gamma)
    model = OneClassSVM(nu=a.nu, kernel=a.kernel, gamma=gamma, degree=a.degree, coef0=a.coef0,
                        tol=a.tol, shrinking=True, cache_size=200)
    model.fit(train)
    os.makedirs(a.out, exist_ok=True)
    fmt = "%.17g"
    np.savetxt(os.path.join(a.out, "train.txt"), train, fmt=fmt)
    np.savetxt(os.path.join(a.out, "test.txt"), test, fmt=fmt)
    np.savetxt(os.path.join(a.out, "decision_train.txt"), model.decision_function(train), fmt=fmt)
    np.savetxt(os.path.join(a.out, "decision_test.txt"), model.decision_function(test), fmt=fmt)
    np.savetxt(os.path.join(a.out, "support.txt"), model.support_, fmt="%d")
    np.savetxt(os.path.join(a.out, "dual_coef.txt"), model.dual_coef_.ravel(), fmt=fmt)
    with open(os.path.join(a.out, "params.txt"), "w") as f:
        f.write("%.17g %.17g %.17g %d\n" % (model._gamma, model.offset_[0], -model.intercept_[0],
                                             len(train)))


if __name__ == "__main__":
    main()
