#!/usr/bin/env python3
"""Writes a benchmark cell: DIR/cell.toml and stored limits for N characteristics c0001..cNNNN.

    python3 bench/make_cell.py DIR N PORT [--flush-ms 10] [--rules beyond|nelson] [--size 1|5]

Invented data for benchmarks only: individuals (or subgroups of 5) around 10.0 with sigma 0.01.
"""
import argparse
import math
import os

p = argparse.ArgumentParser()
p.add_argument("dir")
p.add_argument("n", type=int)
p.add_argument("port", type=int)
p.add_argument("--flush-ms", type=int, default=10)
p.add_argument("--rules", default="beyond")
p.add_argument("--size", type=int, default=1)
p.add_argument("--web", default="", help="[web] listen address, e.g. 127.0.0.1:9631")
a = p.parse_args()

os.makedirs(os.path.join(a.dir, "limits"), exist_ok=True)
sigma = 0.01
if a.size == 1:
    chart, kind, d2, d3 = "individuals", "moving-range", 1.128, 0.853
    half = 3 * sigma
    rc = d2 * sigma
    ru = rc + 3 * d3 * sigma
else:
    chart, kind, d2, d3 = "xbar-r", "range", 2.326, 0.864
    half = 3 * sigma / math.sqrt(a.size)
    rc = d2 * sigma
    ru = rc + 3 * d3 * sigma

chars = []
for i in range(1, a.n + 1):
    cid = f"c{i:04d}"
    with open(os.path.join(a.dir, "limits", f"{cid}.toml"), "w") as f:
        f.write(f"""format = 1
characteristic = "{cid}"
chart = "{chart}"
subgroup_size = {a.size}
unit = "mm"
[sigma]
within = {sigma}
overall = {sigma}
method = "benchmark"
[location]
center = 10.0
ucl = {10.0 + half}
lcl = {10.0 - half}
[dispersion]
kind = "{kind}"
center = {rc}
ucl = {ru}
lcl = 0.0
[provenance]
computed_at = "2026-12-01T00:00:00Z"
source = "bench/make_cell.py"
tool = "bench"
subgroups_total = 25
subgroups_used = 25
used = "1-25"
""")
    rules = (
        '[characteristic.rules]\npreset = "nelson"\n[[characteristic.rules.rule]]\nkind = "ewma"\nlambda = 0.2\nwidth = 2.962\n[[characteristic.rules.rule]]\nkind = "cusum"\nk = 0.5\nh = 5.0\n'
        if a.rules == "nelson"
        else '[[characteristic.rules.rule]]\nkind = "beyond-limits"\n'
    )
    chars.append(f"""[[characteristic]]
id = "{cid}"
unit = "mm"
limits = "limits/{cid}.toml"
subgroup = {{ size = {a.size} }}
{rules}""")

with open(os.path.join(a.dir, "cell.toml"), "w") as f:
    f.write(f"""[daemon]
archive_dir = "archive"
flush_interval_ms = {a.flush_ms}

[alerts]
# Each violation raises a fresh alert once the next reading passes (for the latency bench).
stop = {{ acknowledge = false }}

[control]
socket = "control.sock"
mode = "0600"
{('[web]' + chr(10) + 'listen = "' + a.web + '"' + chr(10)) if a.web else ''}
[[source]]
id = "bench"
kind = "mqtt"
broker = "mqtt://127.0.0.1:{a.port}"
client_id = "linewarden-bench"
topics = ["bench/{{characteristic}}/reading"]
payload = "json"
value_pointer = "/v"
part_pointer = "/part"

[[output]]
id = "hmi"
kind = "mqtt"
broker = "mqtt://127.0.0.1:{a.port}"
topic_prefix = "lw"

""" + "\n".join(chars))
