#!/usr/bin/env python3
"""Exact least-squares solution of the NIST StRD Filip problem AS STORED IN DOUBLES.

NIST certifies Filip for the decimal data. A program working in binary floating point
fits the nearest doubles instead: each x and y rounded to the nearest double, and each
power x**k rounded to the nearest double of the exact power of that rounded x. Filip is so
badly conditioned that this rounding alone moves the exact solution to about 7.6
significant digits from the certified values. This script solves that double problem
exactly in rational arithmetic (fractions.Fraction) so that a test can check how close
the engine gets to the best answer any double-precision program could give.

Standard library only (Python 3). Writes filip_double_exact.json next to itself, every
number as repr(float) (17 significant digits, round-trips).
Usage:  python3 tests/reference/nist-strd/filip_double_exact.py
"""
import json
import math
import os
import platform
from fractions import Fraction

HERE = os.path.dirname(os.path.abspath(__file__))
lines = open(os.path.join(HERE, "Filip.dat"), "rb").read().decode("ascii").replace("\r\n", "\n").split("\n")
rows = [line.split() for line in lines[60:142] if line.strip()]  # data lines 61-142
assert len(rows) == 82
degree = 10
y = [Fraction(float(row[0])) for row in rows]
design = [[Fraction(float(Fraction(float(row[1])) ** k)) for k in range(degree + 1)] for row in rows]
n, p = len(y), degree + 1

cross = [[sum(design[i][a] * design[i][b] for i in range(n)) for b in range(p)] for a in range(p)]
augmented = [cross[a][:] + [sum(design[i][a] * y[i] for i in range(n))] + [Fraction(int(a == b)) for b in range(p)]
             for a in range(p)]
for i in range(p):
    pivot = next(k for k in range(i, p) if augmented[k][i] != 0)
    augmented[i], augmented[pivot] = augmented[pivot], augmented[i]
    head = augmented[i][i]
    augmented[i] = [value / head for value in augmented[i]]
    for k in range(p):
        if k != i and augmented[k][i] != 0:
            factor = augmented[k][i]
            augmented[k] = [u - factor * v for u, v in zip(augmented[k], augmented[i])]
beta = [augmented[i][p] for i in range(p)]
inverse = [augmented[i][p + 1:] for i in range(p)]
rss = sum((y[i] - sum(design[i][a] * beta[a] for a in range(p))) ** 2 for i in range(n))
variance = rss / (n - p)
result = {
    "source": "exact rational least-squares solution of NIST StRD Filip.dat with x, y and x**k rounded to doubles",
    "generated_by": "tests/reference/nist-strd/filip_double_exact.py",
    "python_version": platform.python_version(),
    "estimates": [float(b) for b in beta],
    "standard_deviations": [math.sqrt(float(variance * inverse[k][k])) for k in range(p)],
    "residual_sum_of_squares": float(rss),
}
with open(os.path.join(HERE, "filip_double_exact.json"), "w") as handle:
    json.dump(result, handle, indent=2)
    handle.write("\n")
print("wrote filip_double_exact.json")
