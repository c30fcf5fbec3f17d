#!/usr/bin/env bash
# Scale: resident memory and CPU time per reading with 100, 1,000 and 10,000 characteristics
# (the nelson preset with EWMA and CUSUM, subgroups of 5), the same 200,000 readings each.
#     bash bench/scale.sh [READINGS]
source "$(dirname "$0")/common.sh"
N="${1:-200000}"
start_broker
echo "machine: $(nproc) cores, $(uname -r); $N readings, nelson + EWMA + CUSUM, subgroups of 5"
for C in ${CHARS:-100 1000 10000}; do
    rm -rf "$WORK/cell"; python3 bench/make_cell.py "$WORK/cell" "$C" "$PORT" --rules nelson --size 5
    start_daemon
    idle=$(awk '/VmRSS/ {print $2}' /proc/$DAEMON/status)
    t0=$(now); cpu0=$(awk '{print $14+$15}' /proc/$DAEMON/stat)
    "$LOAD" publish --port "$PORT" --count "$N" --chars "$C" > /dev/null
    while [ "$(readings)" -lt "$N" ]; do sleep 0.05; done; t1=$(now)
    cpu1=$(awk '{print $14+$15}' /proc/$DAEMON/stat); tck=$(getconf CLK_TCK)
    rss=$(awk '/VmRSS/ {print $2}' /proc/$DAEMON/status); hwm=$(awk '/VmHWM/ {print $2}' /proc/$DAEMON/status)
    kill -TERM "$DAEMON"; wait "$DAEMON" || true
    python3 -c "
n=$N; cpu=($cpu1-$cpu0)/$tck; wall=$t1-$t0
print(f'{$C:>6} characteristics: RSS idle {$idle/1024:.1f} MiB, after {$rss/1024:.1f} MiB (peak {$hwm/1024:.1f}); {n/wall:,.0f} readings/s; CPU {cpu*1e6/n:.2f} us per reading')"
done
