# Shared by the bench scripts: a release build, a Mosquitto on a free port, a work directory.
set -euo pipefail
ROOT="$(cd "$(dirname "${BASH_SOURCE[0]}")/.." && pwd)"
cd "$ROOT"
cargo build --release --quiet --bin linewarden --example bench_mqtt
LW="$ROOT/target/release/linewarden"
LOAD="$ROOT/target/release/examples/bench_mqtt"
WORK="$(mktemp -d /tmp/linewarden-bench.XXXXXX)"
MOSQ="$(command -v mosquitto || echo /usr/sbin/mosquitto)"
[ -x "$MOSQ" ] || { echo "mosquitto is not installed (apt-get install mosquitto)"; exit 1; }
PORT="$(python3 -c 'import socket; s=socket.socket(); s.bind(("127.0.0.1",0)); print(s.getsockname()[1])')"
cat > "$WORK/mosquitto.conf" <<CONF
listener $PORT 127.0.0.1
allow_anonymous true
persistence false
max_queued_messages 0
max_inflight_messages 1000
CONF
PIDS=()
cleanup() { for p in "${PIDS[@]:-}"; do kill "$p" 2>/dev/null || true; done; rm -rf "$WORK"; }
trap cleanup EXIT
start_broker() {
    "$MOSQ" -c "$WORK/mosquitto.conf" >/dev/null 2>&1 & PIDS+=($!)
    for _ in $(seq 100); do (echo > /dev/tcp/127.0.0.1/$PORT) 2>/dev/null && return; sleep 0.05; done
    echo "mosquitto did not start"; exit 1
}
# Starts linewarden on $WORK/cell/cell.toml and waits until it has subscribed.
start_daemon() {
    "$LW" run --config "$WORK/cell/cell.toml" 2>"$WORK/daemon.log" & DAEMON=$!; PIDS+=($DAEMON)
    for _ in $(seq 400); do grep -q "subscribed" "$WORK/daemon.log" 2>/dev/null && return; sleep 0.05; done
    echo "linewarden did not subscribe:"; cat "$WORK/daemon.log"; exit 1
}
# The readings the running daemon has taken from the bench source.
readings() {
    "$LW" status --brief --socket "$WORK/cell/control.sock" --json 2>/dev/null \
        | python3 -c 'import json,sys; d=json.load(sys.stdin); print(sum(s["readings"] for s in d["sources"]))' 2>/dev/null || echo 0
}
now() { date +%s.%N; }
