"""Case 1: k-NN regression on a fixed even design, evaluated at the design (ESL eq. 7.10).
Truth: variance = sigma^2/k exactly; bias^2 = (f(x0) - mean_{j in N_k(x0)} f(x_j))^2;
neighbour sets rebuilt with the tool's documented tie rule (key = (squared distance, row index))."""
import math, sys
from common import run, sweep, pooled, HERE

SC = f"{HERE}/knn_sq.toml"
n, sigma = 60, 0.5
f = lambda x: math.sin(6 * x) + 2 * x ** 2
xs = [0.0 + (1.0 - 0.0) * i / (n - 1) for i in range(n)]
grid = [1, 2, 3, 4, 5, 8, 15, 60]

# check reconstruction against the tool's --points
_, rows = run(SC, 1, replicates=3, points=True)
tool_x = [float(r["x"]) for r in rows if r["value"] == "1"]
assert tool_x == xs, "design reconstruction differs"
tool_f = [float(r["truth"]) for r in rows if r["value"] == "1"]
print("max |f_tool - f_python| =", max(abs(a - f(b)) for a, b in zip(tool_f, xs)))

def nbrs(i, k):
    keys = sorted(((xs[j] - xs[i]) * (xs[j] - xs[i]), j) for j in range(n))
    return [j for _, j in keys[:k]]

truth = {}
for k in grid:
    b2 = sum((f(xs[i]) - sum(f(xs[j]) for j in nbrs(i, k)) / k) ** 2 for i in range(n)) / n
    var = sigma ** 2 / k
    truth[float(k)] = dict(noise=sigma ** 2, variance=var, bias_sq=b2,
                           expected_loss=sigma ** 2 + var + b2, expected_loss_direct=sigma ** 2 + var + b2)
if __name__ == "__main__":
    seeds = range(1, int(sys.argv[1]) + 1 if len(sys.argv) > 1 else 41)
    R = int(sys.argv[2]) if len(sys.argv) > 2 else 100
    sweep("case1 knn fixed design, squared", SC, truth, seeds, replicates=R)
