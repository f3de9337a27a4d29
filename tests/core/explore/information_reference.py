"""Reference values for the information-gain estimators, from scipy.

1-D mixtures of B equally weighted Gaussians (B in 2, 3, 5): the Shannon mutual information
between the sample and the component index, I = H(mixture) - (1/B) sum_b H(N_b), with the
mixture entropy -int p ln p from scipy.integrate.quad and the component entropies from
scipy.stats.norm.entropy; and the order-2 Jensen-Renyi divergence
JR2 = -ln int p^2 + (1/B) sum_b ln int N_b^2, each integral by quad.
Diagonal Gaussians in 3-D: entropies from scipy.stats.multivariate_normal(...).entropy().

Writes arrays in the manifest format read by tests/testing/reference.h:
  cases_1d   (n, 11): B, means[5], variances[5] (unused slots 0)
  exact_1d   (n, 3):  mixture entropy, mutual information, JR2 (nats)
  cases_3d   (m, 6):  means[3], variances[3]
  entropy_3d (m, 1)

    /usr/bin/python3 information_reference.py --out DIR --seed 11
"""

import argparse
import os

import numpy as np
from scipy import integrate, stats


def quad_over(f, means, sds):
    lo = float(np.min(means - 14 * sds))
    hi = float(np.max(means + 14 * sds))
    points = sorted(set(np.round(means, 12)))
    value, _ = integrate.quad(f, lo, hi, points=points, limit=1000, epsabs=1e-13, epsrel=1e-12)
    return value


def exact_1d(means, variances):
    sds = np.sqrt(variances)
    comps = [stats.norm(m, s) for m, s in zip(means, sds)]

    def pdf(x):
        return np.mean([c.pdf(x) for c in comps])

    def neg_p_log_p(x):
        p = pdf(x)
        return -p * np.log(p) if p > 0 else 0.0

    h_mix = quad_over(neg_p_log_p, means, sds)
    mi = h_mix - np.mean([c.entropy() for c in comps])
    h2_mix = -np.log(quad_over(lambda x: pdf(x) ** 2, means, sds))
    h2_comp = [-np.log(quad_over(lambda x, c=c: c.pdf(x) ** 2, np.array([c.mean()]),
                                 np.array([c.std()]))) for c in comps]
    return h_mix, mi, h2_mix - np.mean(h2_comp)


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--out", required=True)
    parser.add_argument("--seed", type=int, default=11)
    args = parser.parse_args()
    rng = np.random.default_rng(args.seed)
    os.makedirs(args.out, exist_ok=True)

    cases, exact = [], []
    for b in (2, 3, 5):
        for spread in (0.05, 0.3, 1.0, 3.0, 10.0):
            means = rng.normal(0.0, spread, b)
            variances = np.exp(rng.uniform(-2.0, 1.0, b))
            row = np.zeros(11)
            row[0] = b
            row[1:1 + b] = means
            row[6:6 + b] = variances
            cases.append(row)
            exact.append(exact_1d(means, variances))

    cases_3d, entropy_3d = [], []
    for _ in range(6):
        means = rng.normal(0.0, 2.0, 3)
        variances = np.exp(rng.uniform(-4.0, 2.0, 3))
        cases_3d.append(np.concatenate([means, variances]))
        entropy_3d.append([stats.multivariate_normal(means, np.diag(variances)).entropy()])

    with open(os.path.join(args.out, "manifest.txt"), "w") as manifest:
        for name, array in (("cases_1d", cases), ("exact_1d", exact), ("cases_3d", cases_3d),
                            ("entropy_3d", entropy_3d)):
            a = np.ascontiguousarray(np.asarray(array, dtype="<f8"))
            a.tofile(os.path.join(args.out, name + ".bin"))
            manifest.write(f"{name} {a.shape[0]} {a.shape[1]}\n")


if __name__ == "__main__":
    main()
