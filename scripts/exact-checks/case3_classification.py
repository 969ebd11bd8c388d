"""Case 3: two-class k-NN on a fixed even design evaluated at the design.
Training labels are independent Bernoulli(p(x_j)); the k neighbour set of each design point is
fixed (tool's tie rule: key = (squared distance, row index)), so the neighbour count of 'yes'
labels is Poisson-binomial and every term is an exact finite sum.
0-1 : prediction = majority vote; vote tie (even k) -> class of the nearest neighbour among the
      tied classes = the point's own label (distance 0).  Domingos (2000, Thm 2), Kohavi-Wolpert
      (1996), James (2003) terms; Domingos/James use the main prediction, whose finite-R
      expectation is computed exactly from Binomial(R, p_D) (R odd: no main-prediction ties).
log : q = (count+a)/(k+2a); Heskes (1998): noise H(p), variance -log sum_c exp(E log q_c),
      bias KL(p || qbar); finite-R expectation of the plug-in (mean of log q over R) to 2nd order
      (delta method).   brier: noise 1-sum p^2, bias^2 ||p-Eq||^2, variance E||q-Eq||^2 (exact)."""
import math, sys
from common import run, sweep, pooled, HERE

n = 40
xs = [i / (n - 1) for i in range(n)]
logistic = lambda t: 1 / (1 + math.exp(-t))
pfun = lambda x: 0.1 + 0.8 * logistic(8 * (x - 0.45)) * (1 - 0.5 * (x > 0.8))
P = [pfun(x) for x in xs]
GRID = [1, 2, 3, 5, 9, 15]

def nbrs(i, k):
    return [j for _, j in sorted(((xs[j] - xs[i]) ** 2, j) for j in range(n))[:k]]

def pbinom(ps):
    pmf = [1.0]
    for p in ps:
        new = [0.0] * (len(pmf) + 1)
        for c, w in enumerate(pmf):
            new[c] += w * (1 - p); new[c + 1] += w * p
        pmf = new
    return pmf

def binom_pmf(R, p):
    return [math.comb(R, c) * p ** c * (1 - p) ** (R - c) for c in range(R + 1)]

def zero_one_truth(R):
    fin, inf = {}, {}
    for k in GRID:
        acc_f = dict.fromkeys(["expected_loss", "expected_loss_direct", "noise", "bias", "variance", "net_variance",
                               "unbiased_variance", "biased_variance", "noise_term", "kohavi_wolpert.noise",
                               "kohavi_wolpert.bias_sq", "kohavi_wolpert.variance", "james.systematic_effect",
                               "james.variance_effect"], 0.0)
        acc_i = dict(acc_f)
        for i in range(n):
            nb = nbrs(i, k)
            others = pbinom([P[j] for j in nb if j != i])      # count among the other k-1
            pd = 0.0                                           # P(predict yes)
            for c, w in enumerate(others):
                for own, pw in ((1, P[i]), (0, 1 - P[i])):
                    tot = c + own
                    yes = tot * 2 > k or (tot * 2 == k and own == 1)
                    if yes: pd += w * pw
            pt = P[i]; ystar = 1 if pt > 0.5 else 0
            ptc = [1 - pt, pt]; pdc = [1 - pd, pd]
            loss = 1 - (ptc[0] * pdc[0] + ptc[1] * pdc[1])
            bayes = min(pt, 1 - pt)
            c1 = 2 * pdc[ystar] - 1
            common = {"expected_loss": loss, "expected_loss_direct": loss, "noise": bayes, "noise_term": c1 * bayes,
                      "kohavi_wolpert.noise": 0.5 * (1 - sum(p * p for p in ptc)),
                      "kohavi_wolpert.bias_sq": 0.5 * sum((a - b) ** 2 for a, b in zip(ptc, pdc)),
                      "kohavi_wolpert.variance": 0.5 * (1 - sum(p * p for p in pdc))}
            # R -> infinity
            M = 1 if pd > 0.5 else 0
            V = 1 - pdc[M]; B = int(M != ystar)
            d_inf = dict(common, bias=B, variance=V, net_variance=(V if not B else -V), unbiased_variance=V * (1 - B),
                         biased_variance=V * B, **{"james.systematic_effect": ptc[ystar] - ptc[M],
                                                   "james.variance_effect": loss - (1 - ptc[M])})
            # finite R: N ~ Binom(R, pd) replicates predict yes
            d_fin = dict(common, bias=0.0, variance=0.0, net_variance=0.0, unbiased_variance=0.0, biased_variance=0.0,
                         **{"james.systematic_effect": 0.0, "james.variance_effect": 0.0})
            for N, w in enumerate(binom_pmf(R, pd)):
                M = 1 if 2 * N > R else 0
                Vh = min(N, R - N) / R; B = int(M != ystar)
                lh = 1 - (ptc[0] * (R - N) / R + ptc[1] * N / R)
                d_fin["bias"] += w * B; d_fin["variance"] += w * Vh
                d_fin["net_variance"] += w * (Vh if not B else -Vh)
                d_fin["unbiased_variance"] += w * Vh * (1 - B); d_fin["biased_variance"] += w * Vh * B
                d_fin["james.systematic_effect"] += w * (ptc[ystar] - ptc[M])
                d_fin["james.variance_effect"] += w * (lh - (1 - ptc[M]))
            for a, d in ((acc_f, d_fin), (acc_i, d_inf)):
                for t in a: a[t] += d[t] / n
        fin[float(k)] = acc_f; inf[float(k)] = acc_i
    return fin, inf

def prob_truth(kind, alpha, R):
    out, out_inf = {}, {}
    for k in GRID:
        acc = dict(expected_loss=0.0, expected_loss_direct=0.0, noise=0.0, variance=0.0)
        acc["bias" if kind == "log" else "bias_sq"] = 0.0
        acc_inf = dict(acc)
        for i in range(n):
            pmf = pbinom([P[j] for j in nbrs(i, k)])
            q1 = [(c + alpha) / (k + 2 * alpha) for c in range(k + 1)]
            pt = [1 - P[i], P[i]]
            if kind == "brier":
                m1 = sum(w * q for w, q in zip(pmf, q1)); v1 = sum(w * (q - m1) ** 2 for w, q in zip(pmf, q1))
                d = dict(noise=1 - pt[0] ** 2 - pt[1] ** 2, bias_sq=2 * (pt[1] - m1) ** 2, variance=2 * v1)
                d_inf = d
            else:
                logs = [[math.log(1 - q), math.log(q)] for q in q1]
                L = [sum(w * lg[c] for w, lg in zip(pmf, logs)) for c in (0, 1)]
                Z = sum(math.exp(l) for l in L); qbar = [math.exp(l) / Z for l in L]
                H = -sum(p * math.log(p) for p in pt)
                var = -math.log(Z)
                bias = sum(p * math.log(p / qb) for p, qb in zip(pt, qbar))
                # delta method: E[-LSE(Lhat)] ~ -LSE(L) - tr(Hess * Cov(log q))/(2R), Hess = diag(qbar) - qbar qbar^T
                cov = [[sum(w * (lg[a] - L[a]) * (lg[b] - L[b]) for w, lg in zip(pmf, logs)) for b in (0, 1)] for a in (0, 1)]
                tr = sum(qbar[a] * cov[a][a] for a in (0, 1)) - sum(qbar[a] * qbar[b] * cov[a][b] for a in (0, 1) for b in (0, 1))
                d_inf = dict(noise=H, bias=bias, variance=var)
                d = dict(noise=H, bias=bias + tr / (2 * R), variance=var - tr / (2 * R))
            tot = sum(d_inf.values())
            for a, dd in ((acc, d), (acc_inf, d_inf)):
                for t, v in dd.items(): a[t] += v / n
                a["expected_loss"] += tot / n; a["expected_loss_direct"] += tot / n
        out[float(k)] = acc; out_inf[float(k)] = acc_inf
    return out, out_inf

def show_inf(fin, inf):
    print("   finite-R expectation vs R->inf value (where they differ by >1e-9):")
    for v in fin:
        for t in fin[v]:
            if abs(fin[v][t] - inf[v][t]) > 1e-9:
                print(f"     k={v:g} {t:<26} finite-R {fin[v][t]:.6g}   R->inf {inf[v][t]:.6g}")

if __name__ == "__main__":
    ns = int(sys.argv[1]) if len(sys.argv) > 1 else 40
    which = sys.argv[2].split(",") if len(sys.argv) > 2 else ["zero_one", "log", "brier"]
    # check the design and probabilities against the tool
    _, rows = run(f"{HERE}/cls_knn.toml", 1, replicates=3, points=True)
    r1 = [r for r in rows if r["value"] == "1"]
    assert [float(r["x"]) for r in r1] == xs
    print("max |Bayes error tool - python| =", max(abs(float(r["noise"]) - min(p, 1 - p)) for r, p in zip(r1, P)))
    if "zero_one" in which:
        R = 101
        fin, inf = zero_one_truth(R)
        sweep("case3a knn 0-1 loss (truth = exact finite-R expectation)", f"{HERE}/cls_knn.toml", fin, range(1, ns + 1), replicates=R)
        show_inf(fin, inf)
    for kind in ("log", "brier"):
        if kind not in which: continue
        R = 100
        fin, inf = prob_truth(kind, 0.5, R)
        sweep(f"case3 knn {kind} loss, alpha=0.5", f"{HERE}/cls_knn_{kind}.toml", fin, range(1, ns + 1), replicates=R)
        show_inf(fin, inf)
