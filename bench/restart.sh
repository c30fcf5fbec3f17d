#!/usr/bin/env bash
# Restart: time from starting linewarden on an archive of about 1 GiB to READY (the moment it
# tells systemd it is monitoring), measured with a real notify socket.
#     bash bench/restart.sh [GiB]
source "$(dirname "$0")/common.sh"
GIB="${1:-1}"
echo "machine: $(nproc) cores, $(uname -r); archive of ${GIB} GiB"
python3 bench/make_cell.py "$WORK/cell" 1000 1 --size 5
# Fill the archive with the replay source at full speed (no broker needed).
python3 - "$WORK/cell" "$GIB" <<'PY'
import sys, os, math
d, gib = sys.argv[1], float(sys.argv[2])
# Each reading is about 200 bytes in the archive (record + its share of subgroup results).
n = int(gib * 1024**3 / 200)
with open(os.path.join(d, "feed.jsonl"), "w") as f:
    for i in range(n):
        v = 10.0 + 0.004 * math.sin(i * 0.7)
        f.write('{"t_ms": 0, "characteristic": "c%04d", "value": %.5f}\n' % (i % 1000 + 1, v))
cfg = open(os.path.join(d, "cell.toml")).read()
cfg = cfg.split("[[source]]")[0] + '[[source]]\nid = "fill"\nkind = "replay"\nfile = "feed.jsonl"\nspeed = 0\n\n' + "[[characteristic]]" + cfg.split("[[characteristic]]", 1)[1]
cfg = cfg.replace('[[output]]\nid = "hmi"', '[[output]]\nid = "hmi-unused"').replace('kind = "mqtt"\nbroker = "mqtt://127.0.0.1:1"\ntopic_prefix = "lw"', 'kind = "log"')
open(os.path.join(d, "fill.toml"), "w").write(cfg)
PY
echo "filling the archive ..."; t0=$(now)
"$LW" run --config "$WORK/cell/fill.toml" 2>/dev/null
t1=$(now); du -sh "$WORK/cell/archive" | sed 's/^/  archive: /'
echo "  filled in $(python3 -c "print(round($t1-$t0,1))") s"
# Restart with a notify socket; time to READY=1.
python3 - "$LW" "$WORK/cell/fill.toml" "$WORK" <<'PY'
import os, socket, subprocess, sys, time
lw, cfg, work = sys.argv[1:4]
path = os.path.join(work, "notify.sock")
s = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM); s.bind(path)
for attempt in range(3):
    env = dict(os.environ, NOTIFY_SOCKET=path)
    t0 = time.monotonic()
    p = subprocess.Popen([lw, "run", "--config", cfg], env=env, stderr=subprocess.DEVNULL)
    while True:
        msg = s.recv(4096).decode()
        if "READY=1" in msg:
            print(f"  ready {time.monotonic() - t0:.3f} s after start (run {attempt + 1})")
            break
    p.terminate(); p.wait()
PY
