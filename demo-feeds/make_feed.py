#!/usr/bin/env python3
"""Writes the invented demo feed of cell 4 (a fictional machining cell making the VB-210 valve
body): three characteristics, as JSON lines {"t_ms", "characteristic", "value" or "raw", "part"}.

* vb210-bore: bore diameter, mm, 5 consecutive parts per subgroup, a part every 2 s. After
  part 150 the boring insert starts to wear and the mean moves up by 0.005 mm.
* vb210-face: face height, mm, one part in ten measured (individuals chart), no stored limits:
  linewarden learns them from the first 25 readings.
* vb210-port: port depth, mm, 3 parts per subgroup, learned from the first 20 subgroups.
* vb210-leak: the leak test's PASS or LEAK for every part, p chart in subgroups of 20 parts,
  stored limits (3% leaking). After part 240 a seal on the test fixture's clamp wears and a
  quarter of the parts leak.

A few unreadable gauge outputs are mixed in. Invented data, for the demo only.
Run from the repository root: python3 demo-feeds/make_feed.py"""
import json
import random

rng = random.Random(4211)
# A generator of its own, so the gauges' readings stay as they were before the leak test.
leak_rng = random.Random(9173)
events = []
for part in range(1, 361):
    t = part * 2000
    shift = 0.005 if part > 150 else 0.0
    events.append({"t_ms": t, "characteristic": "vb210-bore",
                   "value": round(rng.gauss(12.0012 + shift, 0.0035), 4), "part": f"VB{part:05d}"})
    if part % 10 == 0:
        events.append({"t_ms": t + 300, "characteristic": "vb210-face",
                       "value": round(rng.gauss(38.200, 0.006), 3), "part": f"VB{part:05d}"})
    events.append({"t_ms": t + 600, "characteristic": "vb210-port",
                   "value": round(rng.gauss(21.450, 0.010), 3), "part": f"VB{part:05d}"})
    leak_p = 0.25 if part > 240 else 0.03
    events.append({"t_ms": t + 1200, "characteristic": "vb210-leak",
                   "result": "LEAK" if leak_rng.random() < leak_p else "PASS", "part": f"VB{part:05d}"})
    if part in (91,):
        # The tester's fault code, which is neither a pass nor a leak.
        events.append({"t_ms": t + 1500, "characteristic": "vb210-leak", "result": "E17"})
    if part in (47, 233):
        events.append({"t_ms": t + 900, "characteristic": "vb210-bore", "raw": "12.0O4"})

with open("demo-feeds/cell4-feed.jsonl", "w") as f:
    for e in sorted(events, key=lambda e: e["t_ms"]):
        f.write(json.dumps(e) + "\n")
