"""Reference adjusted p-values from statsmodels' multipletests for cairn's multiplicity tests.

Reads p_value_vectors.csv and writes multipletests_statsmodels-<version>.csv next to this
script. Vectors containing NA (a failed analysis) are skipped: multipletests takes no
family size apart from the p-values given. Run from this folder:  python3 make_reference.py
"""
import csv
import sys

import numpy
import statsmodels
from statsmodels.stats.multitest import multipletests

# statsmodels' names for the methods cairn calls bonferroni, holm, hochberg, hommel.
METHODS = [("bonferroni", "bonferroni"), ("holm", "holm"),
           ("hochberg", "simes-hochberg"), ("hommel", "hommel")]

vectors = {}
with open("p_value_vectors.csv", newline="") as handle:
    rows = [line for line in handle if not line.startswith("#")]
for row in csv.DictReader(rows):
    vectors.setdefault(row["vector"], []).append(row["p"])

out_file = "multipletests_statsmodels-%s.csv" % statsmodels.__version__
with open(out_file, "w") as out:
    out.write("# statsmodels %s; numpy %s; Python %s; "
              "statsmodels.stats.multitest.multipletests(p, alpha=0.05, method); "
              "written by make_reference.py\n"
              % (statsmodels.__version__, numpy.__version__, sys.version.split()[0]))
    out.write("vector,index,p,method,adjusted\n")
    for name, texts in vectors.items():
        if "NA" in texts:
            continue
        p = numpy.array([float(text) for text in texts])
        for cairn_name, statsmodels_name in METHODS:
            adjusted = multipletests(p, alpha=0.05, method=statsmodels_name)[1]
            for index, (value, adj) in enumerate(zip(p, adjusted), start=1):
                out.write("%s,%d,%r,%s,%r\n" % (name, index, float(value), cairn_name, float(adj)))
print("wrote", out_file)
