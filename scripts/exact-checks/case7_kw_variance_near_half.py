"""Case 7: the Kohavi-Wolpert variance of a two-class k-NN where vote shares sit near 1/2.
Fixed design of 12 training inputs at i/11, 30 evaluation points read back from the tool
(`--points`; between the design points), P(b | x) = 0.5 + 0.35 sin(3 pi x). Each point's vote
distribution p_D is exact: every one of the 2^k labelings of its k nearest training inputs
(key = (|distance|, row index)), majority vote, a vote tie going to the nearest neighbour's class.
The Kohavi-Wolpert (1996) variance 1/2 (1 - sum_c p_D,c^2) = p_D (1 - p_D) is what the tool's
unbiased estimator averages to at any R. At p_D = 1/2 its slope is 0, where a standard error
built on the first-order (jackknife) part alone collapses (docs/bias-se-second-order.md,
"Kohavi-Wolpert variance"). Design and truth first derived by an independent auditor
(2026-12-05), re-written here in the form of the other cases."""
import itertools, math, sys
from common import run, sweep, HERE

SCEN = f"{HERE}/kw_near_half.toml"
n = 12
xs = [i / (n - 1) for i in range(n)]
p_of = lambda x: 0.5 + 0.35 * math.sin(3 * math.pi * x)
GRID = [1, 2, 3, 4, 5, 7, 9]

def p_vote(x0, k):
    order = sorted(range(n), key=lambda i: (abs(xs[i] - x0), i))[:k]
    tot = 0.0
    for ys in itertools.product((0, 1), repeat=k):
        w = 1.0
        for i, y in zip(order, ys):
            w *= p_of(xs[i]) if y else 1 - p_of(xs[i])
        s = sum(ys)
        tot += w * (1 if 2 * s > k else 0 if 2 * s < k else ys[0])
    return tot

if __name__ == "__main__":
    ns = int(sys.argv[1]) if len(sys.argv) > 1 else 200
    R = int(sys.argv[2]) if len(sys.argv) > 2 else 101
    _, rows = run(SCEN, 1, replicates=3, points=True)
    es = [float(r["x"]) for r in rows if r["value"] == "1"]
    assert len(es) == 30, len(es)
    truth = {}
    for k in GRID:
        v = sum(q * (1 - q) for q in (p_vote(e, k) for e in es)) / len(es)
        truth[float(k)] = {"kohavi_wolpert.variance": v}
    sweep(f"case7 k-NN, Kohavi-Wolpert variance near a vote share of 1/2 (R = {R})", SCEN, truth,
          range(1, ns + 1), replicates=R)
