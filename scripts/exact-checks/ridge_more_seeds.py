"""Ridge case with seeds 201..600 (independent of run_all's 1..200) to test the mean of variance."""
import sys
import case2_linear_fixed as c
from common import sweep
import common
orig = common.sweep
def patched(name, sc, truth, seeds, **kw):
    return orig(name + " [seeds 201-600]", sc, truth, range(201, 601), **kw)
c.sweep = patched
c.ridge_case(0)
