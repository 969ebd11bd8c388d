"""Case 5: random design, constant predictors (training inputs redrawn every replicate).
(a) poly degree 0 = training mean: yhat = mean of f(X_i)+eps_i, X ~ U(0,1), f = 3x^2:
    E yhat = E f(X) = 1, Var yhat = (Var f(X) + sigma^2)/n = (0.8 + 0.25)/20;
    bias^2 = mean over eval points (f(x_e) - 1)^2 (eval points from --points).
(b) k-NN classification with k = n = 21: the prediction is the majority of 21 i.i.d. labels with
    P(b) = E p(X) = 0.2 + 0.5/2 = 0.45 (marginally Bernoulli), so p_D(b) = P(Bin(21, .45) >= 11)
    at every point; 0-1 terms as in case 3 (Domingos, Kohavi-Wolpert, James), finite-R exact."""
import math, sys
from common import run, sweep, pooled, HERE

def part_a(ns):
    SC = f"{HERE}/rand_const.toml"
    _, rows = run(SC, 1, replicates=3, points=True)
    xe = [float(r["x"]) for r in rows]
    b2 = sum((3 * x * x - 1) ** 2 for x in xe) / len(xe)
    var = (9 * (1 / 5 - 1 / 9) + 0.25) / 20
    t = {0.0: dict(noise=0.25, variance=var, bias_sq=b2, expected_loss=0.25 + var + b2, expected_loss_direct=0.25 + var + b2)}
    return sweep("case5a random design, poly degree 0 (training mean)", SC, t, range(1, ns + 1), replicates=100)

def part_b(ns):
    SC = f"{HERE}/rand_const_cls.toml"; R = 101; n = 21
    _, rows = run(SC, 1, replicates=3, points=True)
    xe = [float(r["x"]) for r in rows]
    pd = sum(math.comb(n, c) * 0.45 ** c * 0.55 ** (n - c) for c in range(11, n + 1))
    acc = dict.fromkeys(["expected_loss", "expected_loss_direct", "noise", "bias", "variance", "net_variance",
                         "unbiased_variance", "biased_variance", "noise_term", "kohavi_wolpert.noise",
                         "kohavi_wolpert.bias_sq", "kohavi_wolpert.variance", "james.systematic_effect",
                         "james.variance_effect"], 0.0)
    binR = [math.comb(R, N) * pd ** N * (1 - pd) ** (R - N) for N in range(R + 1)]
    for x in xe:
        pt = 0.2 + 0.5 * x; ptc = [1 - pt, pt]; pdc = [1 - pd, pd]; ys = 1 if pt > 0.5 else 0
        loss = 1 - ptc[0] * pdc[0] - ptc[1] * pdc[1]; bay = min(pt, 1 - pt)
        d = {"expected_loss": loss, "expected_loss_direct": loss, "noise": bay, "noise_term": (2 * pdc[ys] - 1) * bay,
             "kohavi_wolpert.noise": 0.5 * (1 - pt ** 2 - (1 - pt) ** 2),
             "kohavi_wolpert.bias_sq": (pt - pd) ** 2, "kohavi_wolpert.variance": 0.5 * (1 - pd ** 2 - (1 - pd) ** 2)}
        for N, w in enumerate(binR):
            M = 1 if 2 * N > R else 0; Vh = min(N, R - N) / R; B = int(M != ys)
            lh = 1 - (ptc[0] * (R - N) + ptc[1] * N) / R
            for key, val in (("bias", B), ("variance", Vh), ("net_variance", Vh if not B else -Vh),
                             ("unbiased_variance", Vh * (1 - B)), ("biased_variance", Vh * B),
                             ("james.systematic_effect", ptc[ys] - ptc[M]), ("james.variance_effect", lh - (1 - ptc[M]))):
                d[key] = d.get(key, 0.0) + w * val
        for kk in acc: acc[kk] += d[kk] / len(xe)
    print(f"   p_D(b) = {pd:.6f}; P(main prediction = b) at R=101: {sum(binR[51:]):.3g}")
    return sweep("case5b random design, knn k=n=21, 0-1", SC, {21.0: acc}, range(1, ns + 1), replicates=R)

if __name__ == "__main__":
    ns = int(sys.argv[1]) if len(sys.argv) > 1 else 40
    part_a(ns); part_b(ns)
