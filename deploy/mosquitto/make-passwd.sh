#!/bin/sh
# Write the broker's password file from environment variables, so no password is
# ever committed. Run by the `broker-init` service of docker-compose.yml, in the
# eclipse-mosquitto image (which has mosquitto_passwd), into /mosquitto/auth.
# Meters get their own entries the same way: user name = device id.
set -eu
out=/mosquitto/auth/passwd
umask 077
: > "$out"
add() {
    if [ -n "$2" ]; then
        mosquitto_passwd -b "$out" "$1" "$2"
    fi
}
add hourwatch "${HOURWATCH_MQTT_PASSWORD:?set HOURWATCH_MQTT_PASSWORD}"
add simulator "${SIMULATOR_MQTT_PASSWORD:-}"
add ward-gateway "${WARD_GATEWAY_MQTT_PASSWORD:-}"
# mosquitto runs as uid 1883 in the official image; the file must be its own
chown 1883:1883 "$out"
chmod 0600 "$out"
echo "password file written with $(wc -l < "$out") user(s)"
