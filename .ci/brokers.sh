#!/usr/bin/env bash
# The message brokers sapwood's broker connectors are tested against: mosquitto (MQTT)
# and redis-server (Redis Streams), both Debian packages; and iproute2 (the ip command),
# with which the grove's tests make the network namespaces their Ray nodes run in.
#
#   bash .ci/brokers.sh install   # apt-get install them (once per machine; no-op if present)
#   bash .ci/brokers.sh start     # start both on loopback ports, print their URLs
#   bash .ci/brokers.sh stop      # stop what 'start' started
#
# The test suite does not need 'start': tests/test_mqtt.py and tests/test_redis_streams.py
# start their own servers on free loopback ports and stop them afterwards. 'start' is for
# trying sapwood by hand and for the broker benchmark.
# Ports: SAPWOOD_MQTT_PORT (default 18830), SAPWOOD_REDIS_PORT (default 16379);
# state (config, data, pid files, logs): SAPWOOD_BROKERS_DIR (default /tmp/sapwood-brokers).
set -euo pipefail

MQTT_PORT=${SAPWOOD_MQTT_PORT:-18830}
REDIS_PORT=${SAPWOOD_REDIS_PORT:-16379}
STATE=${SAPWOOD_BROKERS_DIR:-/tmp/sapwood-brokers}

find_mosquitto() {
    command -v mosquitto || { [ -x /usr/sbin/mosquitto ] && echo /usr/sbin/mosquitto; } || true
}

install() {
    if [ -n "$(find_mosquitto)" ] && command -v redis-server >/dev/null \
            && command -v ip >/dev/null; then
        echo "mosquitto, redis-server and ip are installed"
        return
    fi
    local sudo=""
    [ "$(id -u)" -eq 0 ] || sudo="sudo"
    $sudo apt-get update -qq
    DEBIAN_FRONTEND=noninteractive $sudo apt-get install -y -qq --no-install-recommends \
        mosquitto redis-server iproute2 >/dev/null
    echo "installed: $("$(find_mosquitto)" -h 2>/dev/null | head -n1); $(redis-server --version)"
}

wait_port() {
    for _ in $(seq 1 100); do
        if (exec 3<>"/dev/tcp/127.0.0.1/$1") 2>/dev/null; then return 0; fi
        sleep 0.1
    done
    echo "nothing listens on 127.0.0.1:$1" >&2
    return 1
}

start() {
    local mosquitto
    mosquitto=$(find_mosquitto)
    [ -n "$mosquitto" ] || { echo "mosquitto is missing: run '$0 install'" >&2; exit 1; }
    mkdir -p "$STATE/mqtt" "$STATE/redis"
    # max_queued_messages 0: no cap on what a persistent session may queue while its
    # client is away (mosquitto's default, 1000, drops messages beyond that)
    cat > "$STATE/mqtt/mosquitto.conf" <<EOF
listener $MQTT_PORT 127.0.0.1
allow_anonymous true
persistence true
persistence_location $STATE/mqtt/
max_queued_messages 0
pid_file $STATE/mqtt/mosquitto.pid
log_dest file $STATE/mqtt/mosquitto.log
$([ "$(id -u)" -eq 0 ] && echo "user root")
EOF
    "$mosquitto" -c "$STATE/mqtt/mosquitto.conf" -d
    redis-server --port "$REDIS_PORT" --bind 127.0.0.1 --save "" --appendonly yes \
        --dir "$STATE/redis" --daemonize yes --pidfile "$STATE/redis/redis.pid" \
        --logfile "$STATE/redis/redis.log"
    wait_port "$MQTT_PORT"
    wait_port "$REDIS_PORT"
    echo "mqtt://127.0.0.1:$MQTT_PORT"
    echo "redis://127.0.0.1:$REDIS_PORT/0"
}

stop() {
    local pidfile
    for pidfile in "$STATE/mqtt/mosquitto.pid" "$STATE/redis/redis.pid"; do
        if [ -f "$pidfile" ]; then
            kill "$(cat "$pidfile")" 2>/dev/null || true
            rm -f "$pidfile"
        fi
    done
}

case "${1:-}" in
    install) install ;;
    start) start ;;
    stop) stop ;;
    *) echo "usage: $0 install|start|stop" >&2; exit 1 ;;
esac
