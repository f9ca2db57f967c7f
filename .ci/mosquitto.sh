#!/usr/bin/env bash
# Install the Mosquitto MQTT broker for the telemetry tests when it is missing.
#
# The tests start their own broker processes (127.0.0.1, ephemeral ports, temporary
# configs), so nothing is configured or started here. This script never fails the build:
# without Mosquitto the tests fall back to the pure-Python amqtt broker from the test extra
# (and skip the one test that needs Mosquitto's ACL file).
set -u

have_mosquitto() {
    command -v mosquitto >/dev/null 2>&1 || [ -x /usr/sbin/mosquitto ]
}

report() {
    if have_mosquitto; then
        exe="$(command -v mosquitto 2>/dev/null || echo /usr/sbin/mosquitto)"
        echo "mosquitto.sh: using $("$exe" -h 2>/dev/null | head -n 1)"
    else
        echo "mosquitto.sh: Mosquitto not available; telemetry tests use the amqtt fallback"
    fi
}

if have_mosquitto; then
    report
    exit 0
fi
if ! command -v apt-get >/dev/null 2>&1; then
    echo "mosquitto.sh: no apt-get here"
    report
    exit 0
fi
SUDO=""
if [ "$(id -u)" != "0" ]; then
    if command -v sudo >/dev/null 2>&1 && sudo -n true 2>/dev/null; then
        SUDO="sudo -n"
    else
        echo "mosquitto.sh: not root and no password-less sudo; not installing"
        report
        exit 0
    fi
fi
export DEBIAN_FRONTEND=noninteractive
timeout 600 $SUDO apt-get update -qq >/dev/null 2>&1 \
    || echo "mosquitto.sh: apt-get update failed (continuing)"
timeout 600 $SUDO apt-get install -y -qq --no-install-recommends mosquitto >/dev/null 2>&1 \
    || echo "mosquitto.sh: installing mosquitto failed"
report
exit 0
