"""Case 6: minimum-norm least squares (`minnorm`, no intercept) on the first p of P independent
N(0, 1) inputs, linear truth f(x) = beta'x, n training rows redrawn every replicate, evaluated at
the run's own evaluation points (from --points). With sigma_e^2 = sigma^2 + |beta_omitted|^2 (the
omitted inputs act as independent Gaussian noise) and beta_p, x0p the included coordinates:

  p < n - 1 (least squares):  E b = beta_p,  Cov b = sigma_e^2 I / (n - p - 1)
      (the inverse-Wishart mean E (X'X)^-1 = I/(n - p - 1): Anderson, An Introduction to
      Multivariate Statistical Analysis; Breiman and Freedman 1983, JASA 78:131-136; from memory)
  p > n + 1 (minimum norm, b = P beta_p + X^+ e, P the projection on X's row space, uniformly
      random of rank n): E P = (n/p) I, so E b = (n/p) beta_p; P_11 ~ Beta(n/2, (p - n)/2) gives
      E P_11^2 = n(n+2)/(p(p+2)) and E P_i1^2 = g = n(p-n)/(p(p+2)(p-1)) for i != 1, so
      E[P bb' P] = a bb' + g |b|^2 I with a = n(n+2)/(p(p+2)) - g; E X^+ X^+' = n/(p(p-n-1)) I
      (inverse-Wishart mean again). Cov b = (a - n^2/p^2) beta_p beta_p' + (g |beta_p|^2 +
      sigma_e^2 n/(p(p-n-1))) I.

variance = x0p' Cov b x0p, bias^2 = (E yhat(x0) - f(x0))^2 (the omitted part of f included),
averaged over the evaluation points; noise = sigma^2. Derived by an independent helper session
(not from the crate's code) and checked there by a plain-Python Monte Carlo at small (n, p) and by
a pointwise regression on the tool's per-point output. p in {n-1, n, n+1} is left out: there the
moments are infinite."""
import sys
from common import run, sweep, HERE

N_TRAIN, SIGMA, P = 20, 0.5, 40
BETA = [1.0 / j for j in range(1, P + 1)]

def exact_terms(x0, p, n=N_TRAIN, sigma=SIGMA, beta=BETA):
    bp, bo = beta[:p], beta[p:]
    s2e = sigma ** 2 + sum(b * b for b in bo)
    lin = sum(a * b for a, b in zip(bp, x0[:p]))
    omit = sum(a * b for a, b in zip(bo, x0[p:]))
    nx2 = sum(a * a for a in x0[:p]); nb2 = sum(b * b for b in bp)
    if p < n - 1:
        mean, var = lin, s2e * nx2 / (n - p - 1)
    elif p > n + 1:
        mean = (n / p) * lin
        g = n * (p - n) / (p * (p + 2) * (p - 1))
        a = n * (n + 2) / (p * (p + 2)) - g
        var = (a - (n / p) ** 2) * lin * lin + g * nb2 * nx2 + s2e * n / (p * (p - n - 1)) * nx2
    else:
        raise ValueError("p too close to n")
    f = lin + omit
    return (mean - f) ** 2, var, f

def main(ns):
    sc = f"{HERE}/minnorm_iso.toml"
    _, rows = run(sc, 1, replicates=3, points=True)
    acc = {}
    for r in rows:
        p = int(float(r["value"]))
        x0 = [float(r[f"x{j}"]) for j in range(1, P + 1)]
        b2, v, f = exact_terms(x0, p)
        assert abs(f - float(r["truth"])) < 1e-9 * (1 + abs(f)), (f, r["truth"])
        a = acc.setdefault(float(p), [0.0, 0.0, 0])
        a[0] += b2; a[1] += v; a[2] += 1
    truth = {}
    for p, (b2, v, m) in acc.items():
        b2, v = b2 / m, v / m
        el = SIGMA ** 2 + b2 + v
        truth[p] = dict(noise=SIGMA ** 2, bias_sq=b2, variance=v, expected_loss=el, expected_loss_direct=el)
    return sweep("case6 minimum-norm least squares, isotropic Gaussian inputs", sc, truth, range(1, ns + 1))

if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 40)
