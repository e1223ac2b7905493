#!/bin/sh
# Create Mosquitto's password file for Boutline from the environment and a collars file.
#
#   MQTT_GATEWAY_PASSWORD=... [MQTT_DISPLAY_PASSWORD=...] [MQTT_SIMULATOR_PASSWORD=...] \
#     sh deploy/mosquitto/make-passwd.sh OUT [COLLARS_FILE]
#
# COLLARS_FILE has one collar a line, "<collar_id> <password>"; blank lines and lines starting
# with # are skipped. The username of a collar is its collar id (the ACL's %u pattern).
# Passwords never appear on a command line: a plain file is written with umask 077 and hashed
# in place by `mosquitto_passwd -U`, then moved over OUT. Runs in the eclipse-mosquitto image
# (compose service mqtt-users) and on Raspberry Pi OS (apt-get install mosquitto).
set -eu

die() { echo "Error: $*" >&2; exit 1; }

[ $# -ge 1 ] && [ $# -le 2 ] || die "usage: make-passwd.sh OUT [COLLARS_FILE]"
out=$1
collars=${2:-}
command -v mosquitto_passwd >/dev/null 2>&1 \
  || die "mosquitto_passwd not found; install it with: apt-get install -y mosquitto"
[ -n "${MQTT_GATEWAY_PASSWORD:-}" ] \
  || die "MQTT_GATEWAY_PASSWORD is empty; set it in .env (see .env.example)"

umask 077
tmp="$out.tmp.$$"
trap 'rm -f "$tmp"' EXIT INT TERM
: > "$tmp"

seen=" "
add() {  # add USER PASSWORD WHERE
  case $seen in *" $1 "*) die "$3: user '$1' appears twice; each collar id once" ;; esac
  case $2 in
    "") die "$3: user '$1' has an empty password" ;;
    # mosquitto_passwd -U splits "user:password" at every colon and would cut the password.
    *:*) die "$3: the password of '$1' contains ':'; choose one without (openssl rand -base64 24)" ;;
  esac
  seen="$seen$1 "
  printf '%s:%s\n' "$1" "$2" >> "$tmp"
}

add gateway "$MQTT_GATEWAY_PASSWORD" "MQTT_GATEWAY_PASSWORD"
[ -z "${MQTT_DISPLAY_PASSWORD:-}" ] || add display "$MQTT_DISPLAY_PASSWORD" "MQTT_DISPLAY_PASSWORD"
[ -z "${MQTT_SIMULATOR_PASSWORD:-}" ] \
  || add simulator "$MQTT_SIMULATOR_PASSWORD" "MQTT_SIMULATOR_PASSWORD"

n=0
if [ -n "$collars" ]; then
  [ -r "$collars" ] || die "cannot read collars file $collars; check the path"
  line_no=0
  while IFS= read -r line || [ -n "$line" ]; do
    line_no=$((line_no + 1))
    where="$collars line $line_no"
    case $line in
      "" | "#"*) continue ;;
      *"$(printf '\r')"*) die "$where: carriage return; save the file with Unix line ends" ;;
    esac
    id=${line%%[ 	]*}
    pw=${line#"$id"}
    pw=$(printf '%s' "$pw" | sed 's/^[ 	]*//; s/[ 	]*$//')
    case $id in
      "" | *[!A-Za-z0-9_.-]*) die "$where: collar id must match [A-Za-z0-9_.-]{1,64}" ;;
    esac
    [ ${#id} -le 64 ] || die "$where: collar id longer than 64 characters"
    case $id in
      gateway | display | simulator) die "$where: '$id' is a service user, not a collar id" ;;
    esac
    [ -n "$pw" ] || die "$where: collar '$id' has no password; write '<collar_id> <password>'"
    add "$id" "$pw" "$where"
    n=$((n + 1))
  done < "$collars"
fi

mosquitto_passwd -U "$tmp" || die "mosquitto_passwd could not hash $tmp"
# Mosquitto reads the file after dropping root; it must own it (and nobody else read it).
if [ "$(id -u)" = 0 ] && id mosquitto >/dev/null 2>&1; then
  chown mosquitto: "$tmp"
fi
chmod 0600 "$tmp"
mv -f "$tmp" "$out"
trap - EXIT INT TERM
echo "Wrote $out: gateway$( [ -z "${MQTT_DISPLAY_PASSWORD:-}" ] || echo ', display')$( [ -z "${MQTT_SIMULATOR_PASSWORD:-}" ] || echo ', simulator') and $n collar(s)."
