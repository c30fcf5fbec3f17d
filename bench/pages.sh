#!/usr/bin/env bash
# Live pages against ingest: the ingest rate of a QoS 1 stream with the page served and no
# browser, then with 20 pages open (each holds the event stream and fetches the overview on
# every change, as the page's script does), in one run; the daemon's peak memory of each.
#     bash bench/pages.sh [READINGS] [CHARACTERISTICS] [PAGES]
source "$(dirname "$0")/common.sh"
N="${1:-200000}"; C="${2:-100}"; P="${3:-20}"
start_broker
WEB="$(python3 -c 'import socket; s=socket.socket(); s.bind(("127.0.0.1",0)); print(s.getsockname()[1])')"
echo "machine: $(nproc) cores, $(uname -r); $N readings over $C characteristics, QoS 1"
run() {  # $1 = pages
    rm -rf "$WORK/cell"
    python3 bench/make_cell.py "$WORK/cell" "$C" "$PORT" --web "127.0.0.1:$WEB"
    start_daemon
    local clients=()
    if [ "$1" -gt 0 ]; then
        python3 bench/page_clients.py "$WEB" "$1" > "$WORK/clients.log" 2>&1 & clients+=($!); PIDS+=($!)
        sleep 1
    fi
    local t0 t1 rss
    t0=$(now); "$LOAD" publish --port "$PORT" --count "$N" --chars "$C" | sed 's/^/  publisher: /'
    while [ "$(readings)" -lt "$N" ]; do sleep 0.02; done; t1=$(now)
    rss=$(awk '/VmHWM/ {print $2}' /proc/$DAEMON/status)
    for c in "${clients[@]:-}"; do [ -n "$c" ] && kill "$c" 2>/dev/null; done
    [ "$1" -gt 0 ] && sed 's/^/  pages: /' "$WORK/clients.log" | tail -2
    kill -TERM "$DAEMON"; wait "$DAEMON" || true
    RATE=$(python3 -c "print($N/($t1-$t0))"); RSS=$((rss/1024))
    echo "$1 pages: $N in $(python3 -c "print(round($t1-$t0,3))") s = $(python3 -c "print(round($RATE))") readings/s (peak RSS $RSS MiB)"
}
run 0; base=$RATE; base_rss=$RSS
run "$P"; with=$RATE; with_rss=$RSS
run 0; base2=$RATE
echo "with $P pages: $(python3 -c "print(round(100*$with/(($base+$base2)/2),1))") % of the rate without (without: $(python3 -c "print(round($base))"), $(python3 -c "print(round($base2))") readings/s); peak RSS $base_rss → $with_rss MiB"
