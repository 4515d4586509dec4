#!/bin/sh
# The cluster of "When one process is not enough" on one machine: a NATS server with
# JetStream, two workers (worker-1.yaml, worker-2.yaml) and a merger (merger.yaml), fed by
# `streamcount generate --publish ... --partitions 2` at 1,000 orders/s for 90 s, with a
# co-purchase planted from the 60th second. Alerts (JSON lines) go to run/alerts.jsonl; the
# merged window is on http://127.0.0.1:10697 (/v1/status, /v1/rules, /metrics).
#
# Needs nats-server (Debian: apt-get install nats-server) and streamcount (STREAMCOUNT=path,
# e.g. STREAMCOUNT=.venv/bin/streamcount). Everything goes to examples/cluster/run/; Ctrl-C
# stops every process. ORDERS and RATE change the feed's size and pace.
set -eu
sc=${STREAMCOUNT:-streamcount}
case "$sc" in */*) sc=$(cd "$(dirname "$sc")" && pwd)/$(basename "$sc") ;; esac
cd "$(dirname "$0")"
bin=$(dirname "$(command -v "$sc")")
py=${PYTHON:-$bin/python}  # streamcount's own Python (it has nats-py)
[ -x "$py" ] || py=python3
orders=${ORDERS:-90000}
rate=${RATE:-1000}
url=nats://127.0.0.1:4222
mkdir -p run

pids=""
stop() {
    for pid in $pids; do kill "$pid" 2>/dev/null || true; done
    wait 2>/dev/null || true
}
trap stop EXIT INT TERM

listening() {
    "$py" -c "import socket; socket.create_connection(('127.0.0.1', 4222), 1)" 2>/dev/null
}
if listening; then
    echo "127.0.0.1:4222 is taken (another NATS server?): stop it, or change the port in" \
        "nats.conf and in the servers of the three configs" >&2
    exit 1
fi
nats-server -c nats.conf >run/nats.log 2>&1 &
nats=$!
pids="$pids $nats"
tries=0
until listening; do
    tries=$((tries + 1))
    if [ "$tries" -gt 50 ] || ! kill -0 "$nats" 2>/dev/null; then
        echo "nats-server did not start: see examples/cluster/run/nats.log" >&2
        exit 1
    fi
    sleep 0.2
done
"$py" create_streams.py "$url" streams/ORDERS.json streams/PANES.json

"$sc" run --config worker-1.yaml 2>run/w1.log &
pids="$pids $!"
"$sc" run --config worker-2.yaml 2>run/w2.log &
pids="$pids $!"
"$sc" merge --config merger.yaml >>run/alerts.jsonl 2>run/merger.log &
pids="$pids $!"

"$sc" generate --transactions "$orders" --rate "$rate" --pace --start-time "$(date +%s)" \
    --format jsonl --drift "breakfast-tea-tin,wildflower-honey-jar@$((orders * 2 / 3))~0.05" \
    --publish "$url" --subject 'orders.{partition}' --partitions 2 --orders-per-message 10
echo "feed published; the last panes close when the workers see it quiet (input.idle_seconds)" >&2
sleep 25
"$py" - <<'PY'
import json
import urllib.request

status = json.load(urllib.request.urlopen("http://127.0.0.1:10697/v1/status", timeout=5))
shown = {k: status[k] for k in ("transactions_seen", "window", "alerts", "cluster")}
print(json.dumps(shown, indent=1))
PY
echo "alerts: run/alerts.jsonl; logs: run/*.log" >&2
