#!/usr/bin/env bash
# Ingest ratio: how fast linewarden ingests, checks and durably archives a QoS 1 stream, next
# to how fast a plain subscriber (mosquitto_sub to /dev/null) drains the same stream.
#     bash bench/ingest.sh [READINGS] [CHARACTERISTICS]
source "$(dirname "$0")/common.sh"
N="${1:-200000}"; C="${2:-1000}"
command -v mosquitto_sub >/dev/null || { echo "mosquitto_sub is not installed (apt-get install mosquitto-clients)"; exit 1; }
start_broker
echo "machine: $(nproc) cores, $(uname -r); $N readings over $C characteristics, QoS 1"
# 1. The plain subscriber.
mosquitto_sub -h 127.0.0.1 -p "$PORT" -q 1 -i bench-sub -c -t 'bench/#' -C "$N" > /dev/null & SUB=$!; PIDS+=($SUB)
sleep 0.5
t0=$(now); "$LOAD" publish --port "$PORT" --count "$N" --chars "$C" | sed 's/^/  publisher: /'
wait "$SUB"; t1=$(now)
plain=$(python3 -c "print($N/($t1-$t0))")
echo "plain subscriber: $N in $(python3 -c "print(round($t1-$t0,3))") s = $(python3 -c "print(round($plain))") readings/s"
# 2. linewarden, QoS 1 acknowledged only once durable.
python3 bench/make_cell.py "$WORK/cell" "$C" "$PORT"
start_daemon
t0=$(now); "$LOAD" publish --port "$PORT" --count "$N" --chars "$C" | sed 's/^/  publisher: /'
while [ "$(readings)" -lt "$N" ]; do sleep 0.02; done; t1=$(now)
rss=$(awk '/VmHWM/ {print $2}' /proc/$DAEMON/status)
kill -TERM "$DAEMON"; wait "$DAEMON" || true
lw=$(python3 -c "print($N/($t1-$t0))")
echo "linewarden: $N in $(python3 -c "print(round($t1-$t0,3))") s = $(python3 -c "print(round($lw))") readings/s (peak RSS $((rss/1024)) MiB)"
echo "ratio: $(python3 -c "print(round(100*$lw/$plain,1))") % of the plain subscriber"
"$LW" archive stats "$WORK/cell/archive" | grep -E "reading-accepted|records" | sed 's/^/  archive: /'
