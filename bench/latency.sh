#!/usr/bin/env bash
# Alert latency: from publishing the reading that completes a violating subgroup to the alert's
# "raised" event arriving on MQTT, at several reading rates.
#     bash bench/latency.sh [RATES...]   (default 1000 10000 50000)
source "$(dirname "$0")/common.sh"
RATES=("${@:-1000 10000 50000}"); [ $# -eq 0 ] && RATES=(1000 10000 50000)
C="${C:-100}"; S="${S:-10}"
start_broker
echo "machine: $(nproc) cores, $(uname -r); $C characteristics (individuals), ${S} s per rate"
for R in "${RATES[@]}"; do
    rm -rf "$WORK/cell"; python3 bench/make_cell.py "$WORK/cell" "$C" "$PORT"
    start_daemon
    "$LOAD" latency --port "$PORT" --rate "$R" --seconds "$S" --chars "$C" --prefix lw
    kill -TERM "$DAEMON"; wait "$DAEMON" || true
done
