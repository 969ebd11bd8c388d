"""Distribution of one replicate's averaged 0-1 expected loss at k=15 (case 3a design), by simulation:
explains seed 109's z = -6.5 (a skewed per-replicate loss)."""
import random, math
from case3_classification import xs, P, nbrs, n
random.seed(5)
k = 15
NB = [nbrs(i, k) for i in range(n)]
L = []
for r in range(20000):
    y = [1 if random.random() < p else 0 for p in P]
    loss = 0.0
    for i in range(n):
        c = sum(y[j] for j in NB[i]); pred = 1 if 2 * c > k else 0
        loss += 1 - (P[i] if pred else 1 - P[i])
    L.append(loss / n)
m = sum(L) / len(L); sd = math.sqrt(sum((v - m) ** 2 for v in L) / (len(L) - 1))
sk = sum((v - m) ** 3 for v in L) / len(L) / sd ** 3
Ls = sorted(L)
print(f"mean {m:.5f} sd {sd:.5f} skewness {sk:.2f} quantiles 1% {Ls[200]:.4f} 50% {Ls[10000]:.4f} 99% {Ls[19800]:.4f} max {Ls[-1]:.4f}")
print("SE of a mean of 101 replicates:", sd / math.sqrt(101))
