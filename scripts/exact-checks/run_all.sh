#!/bin/sh
# Re-run every case with N seeds (default 200); outputs in out/.
N=${1:-200}
cd "$(dirname "$0")" && mkdir -p out
python3 case1_knn_fixed.py $N > out/case1.txt
python3 case2_linear_fixed.py $N > out/case2.txt
python3 case3_classification.py $N > out/case3.txt
python3 case4_poisson.py $N > out/case4.txt
python3 case5_random_design_constant.py $N > out/case5.txt
python3 case6_minnorm.py $N > out/case6.txt
python3 case7_kw_variance_near_half.py $N > out/case7.txt
python3 ridge_more_seeds.py > out/case2b_seeds201-600.txt
python3 case1_knn_fixed.py $N 10 > out/case1_R10.txt
python3 find_outliers_01.py > out/case3a_outliers.txt
python3 skew_01_k15.py > out/case3a_skew.txt
