"""Case 2: polynomial least squares and ridge on a fixed design (noise redrawn only).
Both predictions are linear smoothers yhat(x0) = h(x0)^T y, so exactly
  variance = sigma^2 ||h||^2,  bias^2 = (h^T f - f(x0))^2       (ESL eqs. 7.9 / 3.44-3.47).
poly : OLS on all monomials of degree <= d (span = tool's Legendre basis on training-scaled x);
       exact rational arithmetic (fractions) on the float inputs.
ridge: tool convention (src/family/ridge.rs): columns standardized with TRAINING mean and
       POPULATION sd (divide by n), intercept unpenalized (= ybar), lambda on the sum-of-squares
       scale: yhat0 = ybar + z0^T (Z^T Z + lambda I)^{-1} Z^T y."""
import math, sys
from fractions import Fraction as F
from common import run, sweep, pooled, HERE

def solve(A, b):
    """Gaussian elimination with partial pivoting; works for Fractions or floats."""
    n = len(A); M = [list(r) + [bb] for r, bb in zip(A, b)]
    for c in range(n):
        p = max(range(c, n), key=lambda r: abs(M[r][c])); M[c], M[p] = M[p], M[c]
        for r in range(n):
            if r != c and M[r][c] != 0:
                fac = M[r][c] / M[c][c]
                M[r] = [a - fac * q for a, q in zip(M[r], M[c])]
    return [M[i][n] / M[i][i] for i in range(n)]

def smoother_terms(H_rows, fx_train, f_eval, sigma2):
    b2 = v = 0.0
    for h, f0 in zip(H_rows, f_eval):
        mean = sum(hi * fi for hi, fi in zip(h, fx_train))
        b2 += (float(mean) - f0) ** 2
        v += sigma2 * float(sum(hi * hi for hi in h))
    m = len(f_eval)
    return b2 / m, v / m

def poly_case(nseeds):
    SC = f"{HERE}/poly_fixed.toml"; n, sigma = 30, 0.3
    f = lambda x: math.exp(x) * math.cos(4 * x)
    xt = [i / (n - 1) for i in range(n)]
    _, rows = run(SC, 1, replicates=3, points=True)
    xe = [float(r["x"]) for r in rows if r["value"] == "0"]
    truth = {}
    for d in [0, 1, 2, 3, 5, 8]:
        B = [[F(x) ** j for j in range(d + 1)] for x in xt]
        G = [[sum(B[i][a] * B[i][b] for i in range(n)) for b in range(d + 1)] for a in range(d + 1)]
        H = []
        for x0 in xe:
            b0 = [F(x0) ** j for j in range(d + 1)]
            w = solve(G, b0)                       # (B^T B)^{-1} b0
            H.append([sum(B[i][a] * w[a] for a in range(d + 1)) for i in range(n)])
        b2, v = smoother_terms(H, [f(x) for x in xt], [f(x) for x in xe], sigma ** 2)
        truth[float(d)] = dict(noise=sigma ** 2, variance=v, bias_sq=b2, expected_loss=sigma ** 2 + v + b2,
                               expected_loss_direct=sigma ** 2 + v + b2)
    return sweep("case2a poly, fixed even design n=30, 50 eval points", SC, truth, range(1, nseeds + 1), replicates=100)

def ridge_case(nseeds):
    SC = f"{HERE}/ridge_fixed.toml"; sigma = 1.0
    _, rows = run(SC, 1, replicates=3, points=True)
    r0 = [r for r in rows if r["value"] == "0"]
    X = [[float(r["a"]), float(r["b"]), float(r["c"])] for r in r0]
    ftr = [float(r["truth"]) for r in r0]
    fpy = [1 + 2 * a - 0.5 * b + 0.3 * a * c + math.sin(c) for a, b, c in X]
    print("ridge: max |f_tool - f_python| =", max(abs(p - q) for p, q in zip(ftr, fpy)))
    n, p = len(X), 3
    mu = [sum(r[j] for r in X) / n for j in range(p)]
    sd = [math.sqrt(sum((r[j] - mu[j]) ** 2 for r in X) / n) for j in range(p)]
    Z = [[(r[j] - mu[j]) / sd[j] for j in range(p)] for r in X]
    truth = {}
    for lam in [0, 0.1, 1, 10, 100, 1000]:
        G = [[sum(Z[i][a] * Z[i][b] for i in range(n)) + (lam if a == b else 0) for b in range(p)] for a in range(p)]
        H = []
        for z0 in Z:
            w = solve(G, z0)
            H.append([1.0 / n + sum(Z[i][a] * w[a] for a in range(p)) for i in range(n)])
        b2, v = smoother_terms(H, fpy, fpy, sigma ** 2)
        truth[float(lam)] = dict(noise=1.0, variance=v, bias_sq=b2, expected_loss=1 + v + b2, expected_loss_direct=1 + v + b2)
    return sweep("case2b ridge, fixed design n=25 p=3, eval at design", SC, truth, range(1, nseeds + 1), replicates=100)

if __name__ == "__main__":
    ns = int(sys.argv[1]) if len(sys.argv) > 1 else 40
    poly_case(ns); ridge_case(ns)
