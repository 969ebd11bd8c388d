"""Case 4: Poisson deviance, k-NN on a fixed even design evaluated at the design.
mu = S/k with S ~ Poisson(Lambda), Lambda = sum of lambda over the fixed neighbour set.
Bregman decomposition (generator phi(y) = 2 y log y; Pfau 2013 / Banerjee et al. 2005, from memory):
  noise = E D(Y, lam) = 2(E[Y log Y] - lam log lam), Y ~ Poisson(lam);
  mu~ = exp(E log mu);  bias = D(lam, mu~);  variance = 2(E mu - mu~).
Finite-R expectation of the plug-in (mu~ from the R predictions): E exp(Lhat) ~ mu~ (1 + Var(log mu)/(2R))
(delta method), so E var_hat ~ var - mu~ Var(log mu)/R and bias the opposite; loss is unbiased."""
import math, sys
from common import run, sweep, pooled, HERE

n = 40
xs = [i / (n - 1) for i in range(n)]
lam = [20 + 10 * math.sin(5 * x) for x in xs]
GRID = [2, 3, 5, 9, 15]

def pois_pmf(L, cut=1e-18):
    out = []; c = 0; lp = -L
    top = int(L + 20 * math.sqrt(L) + 50)
    for c in range(top):
        out.append(math.exp(lp)); lp += math.log(L) - math.log(c + 1)
    return out

def nbrs(i, k):
    return [j for _, j in sorted(((xs[j] - xs[i]) ** 2, j) for j in range(n))[:k]]

def truth(R):
    fin, inf = {}, {}
    for k in GRID:
        a = dict(expected_loss=0.0, expected_loss_direct=0.0, noise=0.0, bias=0.0, variance=0.0); b = dict(a)
        for i in range(n):
            l = lam[i]
            ylogy = sum(w * (y * math.log(y) if y > 0 else 0.0) for y, w in enumerate(pois_pmf(l)))
            noise = 2 * (ylogy - l * math.log(l))
            pmf = pois_pmf(sum(lam[j] for j in nbrs(i, k)))
            p0 = pmf[0]
            # condition on S > 0 (P(S=0) < 1e-8 here; the tool stops on a zero mean)
            El = sum(w * math.log(s / k) for s, w in enumerate(pmf) if s > 0) / (1 - p0)
            Vl = sum(w * (math.log(s / k) - El) ** 2 for s, w in enumerate(pmf) if s > 0) / (1 - p0)
            Em = sum(w * s / k for s, w in enumerate(pmf)) / (1 - p0)
            gm = math.exp(El)
            bias = 2 * (l * math.log(l / gm) - (l - gm)); var = 2 * (Em - gm)
            tot = noise + bias + var
            for acc, bb, vv in ((a, bias + gm * Vl / R, var - gm * Vl / R), (b, bias, var)):
                acc["noise"] += noise / n; acc["bias"] += bb / n; acc["variance"] += vv / n
                acc["expected_loss"] += tot / n; acc["expected_loss_direct"] += tot / n
        fin[float(k)] = a; inf[float(k)] = b
    return fin, inf

if __name__ == "__main__":
    ns = int(sys.argv[1]) if len(sys.argv) > 1 else 40
    SC = f"{HERE}/pois_knn.toml"
    _, rows = run(SC, 1, replicates=3, points=True)
    r0 = [r for r in rows if r["value"] == "2"]
    assert [float(r["x"]) for r in r0] == xs
    fin, inf = truth(100)
    nz = [2 * (sum(w * (y * math.log(y) if y else 0) for y, w in enumerate(pois_pmf(l))) - l * math.log(l)) for l in lam]
    print("max |noise_tool - noise_python| per point =", max(abs(float(r["noise"]) - v) for r, v in zip(r0, nz)))
    sweep("case4 knn Poisson deviance", SC, fin, range(1, ns + 1), replicates=100)
    for v in fin:
        print(f"   k={v:g}: R->inf bias {inf[v]['bias']:.6g} var {inf[v]['variance']:.6g} | finite-R bias {fin[v]['bias']:.6g} var {fin[v]['variance']:.6g}")
