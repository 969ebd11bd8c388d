"""Locate the seeds behind the extreme z-scores of case 3a (0-1 loss): prints seed, k, term, z, est, SE."""
import sys
from case3_classification import zero_one_truth, HERE
from common import run, dig
fin, _ = zero_one_truth(101)
rows = []
for s in range(1, 201):
    r, _ = run(f"{HERE}/cls_knn.toml", s, replicates=101)
    for p in r["points"]:
        for t in ("expected_loss", "james.variance_effect", "kohavi_wolpert.bias_sq"):
            se = dig(p["stderr"], t); est = dig(p, t)
            rows.append(((est - fin[p["value"]][t]) / se, s, p["value"], t, est, se, fin[p["value"]][t]))
rows.sort(key=lambda r: r[0])
for r in rows[:6]: print(r)
