#!/usr/bin/env python3
"""Writes the invented baseline used by the demo: bore diameter of the VB-210 valve body,
machined in cell 4 of a fictional plant. 25 subgroups of 5 readings, in mm; subgroup 9 was cut
just after an insert change (an assignable cause) and sits high. Invented data, for the demo only.
Run from the repository root: python3 demo-feeds/make_baseline.py"""
import math
import random

rng = random.Random(4210)
rows = []
for s in range(1, 26):
    mean = 12.0010 + (0.0140 if s == 9 else 0.0)
    rows.append([round(rng.gauss(mean, 0.0040), 4) for _ in range(5)])

with open("demo-feeds/vb210-bore-baseline.csv", "w") as f:
    f.write("# VB-210 valve body, bore diameter (mm), spec 12.000 +/- 0.015. Invented demo data.\n")
    f.write("# One row per subgroup of 5 consecutive parts, sampled every 30 minutes.\n")
    f.write("r1,r2,r3,r4,r5\n")
    for r in rows:
        f.write(",".join(f"{v:.4f}" for v in r) + "\n")

# Face runout of the same part (mm, upper specification 0.050 only): a reading that cannot go
# below zero and tails to the right, as runout does. One reading per part, 80 parts in a row.
# Invented data, for the demo only (the README's percentile-method example).
rng = random.Random(4211)
runout = [round(0.012 * math.exp(rng.gauss(0.0, 0.45)), 4) for _ in range(80)]
with open("demo-feeds/vb210-face-runout.csv", "w") as f:
    f.write("# VB-210 valve body, sealing-face runout (mm), upper spec 0.050. Invented demo data.\n")
    f.write("# One reading per part, 80 consecutive parts.\n")
    f.write("runout\n")
    for v in runout:
        f.write(f"{v:.4f}\n")
