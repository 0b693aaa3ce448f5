#!/usr/bin/env bash
# Prove the shipped deploy files on real brokers: the ACL (mosquitto-watchdog.acl) and the
# bridge to a central broker (bridge-to-central.conf, central.acl).
#
# Two mosquitto processes start on free loopback ports with the shipped configs, rewritten
# only where a test must differ: ports, persistence folder, a test password file, the ACL's
# path, the central broker's address, and no TLS (certificates are proven by the agent tests).
# Each rule is then tried with the mosquitto clients: what must arrive arrives, what the ACL
# forbids does not. Both brokers are stopped by their process ids on exit.
# Needs mosquitto and mosquitto-clients (apt-get install -y mosquitto mosquitto-clients).
set -euo pipefail
HERE="$(cd "$(dirname "$0")" && pwd)"
for tool in mosquitto mosquitto_pub mosquitto_sub mosquitto_passwd; do
  if ! command -v "$tool" >/dev/null 2>&1 && [ ! -x "/usr/sbin/$tool" ]; then
    echo "deploy/check.sh: $tool is missing: apt-get install -y mosquitto mosquitto-clients" >&2
    exit 2
  fi
done
MOSQUITTO="$(command -v mosquitto || echo /usr/sbin/mosquitto)"
WORK="$(mktemp -d)"
PIDS=()
cleanup() {
  for pid in "${PIDS[@]}"; do kill "$pid" 2>/dev/null || true; done
  for pid in "${PIDS[@]}"; do wait "$pid" 2>/dev/null || true; done
  rm -rf "$WORK"
}
trap cleanup EXIT

free_port() { python3 -c 'import socket; s=socket.socket(); s.bind(("127.0.0.1",0)); print(s.getsockname()[1]); s.close()'; }
GW_PORT="$(free_port)"
CENTRAL_PORT="$(free_port)"
while [ "$CENTRAL_PORT" = "$GW_PORT" ]; do CENTRAL_PORT="$(free_port)"; done
pw() { echo "test-$1-secret"; }

make_passwords() { # file user...
  local file="$1"; shift
  : > "$file"
  for u in "$@"; do mosquitto_passwd -b "$file" "$u" "$(pw "$u")"; done
  chmod 600 "$file"
}
make_passwords "$WORK/gateway.passwd" watchdog-edge model-steam-flow meter-steam-flow operator viewer watchdog-page
make_passwords "$WORK/central.passwd" bridge-boiler-house-1 operator viewer watchdog-page
mkdir -p "$WORK/gateway" "$WORK/central"

# The shipped configs with the test's ports, paths and passwords.
sed -e "s|^listener 8883\$|listener $GW_PORT 127.0.0.1|" \
    -e '/^cafile /d' -e '/^certfile /d' -e '/^keyfile /d' \
    -e "s|^persistence_location .*|persistence_location $WORK/gateway/|" \
    -e "s|^password_file .*|password_file $WORK/gateway.passwd|" \
    -e "s|^acl_file .*|acl_file $HERE/mosquitto-watchdog.acl|" \
    "$HERE/mosquitto-watchdog.conf" > "$WORK/gateway.conf"
sed -e "s|^address .*|address 127.0.0.1:$CENTRAL_PORT|" \
    -e '/^bridge_cafile /d' \
    -e "s|^remote_password .*|remote_password $(pw bridge-boiler-house-1)|" \
    "$HERE/bridge-to-central.conf" >> "$WORK/gateway.conf"
sed -e "s|^listener 8883\$|listener $CENTRAL_PORT 127.0.0.1|" \
    -e '/^cafile /d' -e '/^certfile /d' -e '/^keyfile /d' \
    -e "s|^persistence_location .*|persistence_location $WORK/central/|" \
    -e "s|^password_file .*|password_file $WORK/central.passwd|" \
    -e "s|^acl_file .*|acl_file $HERE/central.acl|" \
    "$HERE/central-mosquitto.conf" > "$WORK/central.conf"
for name in gateway central; do
  # run as whoever runs the check (as root mosquitto would switch to its own user, which
  # cannot read this temporary folder); log to a file for the report
  printf 'user %s\nlog_dest file %s\nlog_type all\n' "$(id -un)" "$WORK/$name.log" >> "$WORK/$name.conf"
done
grep -q "^acl_file $HERE/mosquitto-watchdog.acl" "$WORK/gateway.conf"
grep -q "^topic watchdog/agents/boiler-house-1/commands/planned-work in 1" "$WORK/gateway.conf"

"$MOSQUITTO" -c "$WORK/central.conf" >"$WORK/central.out" 2>&1 & PIDS+=($!)
"$MOSQUITTO" -c "$WORK/gateway.conf" >"$WORK/gateway.out" 2>&1 & PIDS+=($!)
for port in "$CENTRAL_PORT" "$GW_PORT"; do
  for _ in $(seq 1 100); do
    if python3 -c "import socket,sys; socket.create_connection(('127.0.0.1',$port),0.2)" 2>/dev/null; then break; fi
    sleep 0.1
  done
done

FAILED=0
pass() { echo "ok    $*"; }
fail() { echo "FAIL  $*"; FAILED=1; }
pub() { # port user topic message [-r]
  mosquitto_pub -h 127.0.0.1 -p "$1" -u "$2" -P "$(pw "$2")" -q 1 -t "$3" -m "$4" "${@:5}" || true
}
SUBS=()
sub() { # port user outfile seconds topic...
  local port="$1" user="$2" out="$3" secs="$4"; shift 4
  local args=()
  for t in "$@"; do args+=(-t "$t"); done
  mosquitto_sub -h 127.0.0.1 -p "$port" -u "$user" -P "$(pw "$user")" -q 1 -v -W "$secs" "${args[@]}" \
    >"$WORK/$out" 2>"$WORK/$out.err" &
  SUBS+=($!)
}
has() { grep -q -- "$2" "$WORK/$1"; }

# 1. Wait for the bridge: the agent's retained status, published on the gateway, must reach
#    the central broker.
STATUS=watchdog/agents/boiler-house-1/status
pub "$GW_PORT" watchdog-edge "$STATUS" '{"agent":"boiler-house-1","connection":"online"}' -r
bridged=0
for _ in $(seq 1 30); do
  if mosquitto_sub -h 127.0.0.1 -p "$CENTRAL_PORT" -u viewer -P "$(pw viewer)" -t "$STATUS" -C 1 -W 1 \
       2>/dev/null | grep -q boiler-house-1; then bridged=1; break; fi
  sleep 0.3
done
[ "$bridged" = 1 ] && pass "bridge: the agent's retained status reached the central broker" \
  || fail "bridge: the status never reached the central broker (see $WORK/gateway.log)"

# 2. Every rule at once: listeners first, then the publishers.
CMD=watchdog/agents/boiler-house-1/commands/planned-work
sub "$GW_PORT" watchdog-edge agent.txt 4 plant/boiler/steam-flow/pred plant/boiler/steam-flow/meter "$CMD"
sub "$GW_PORT" operator operator.txt 4 'watchdog/#'
sub "$GW_PORT" model-steam-flow sensor.txt 4 'watchdog/#' 'plant/#'
sub "$CENTRAL_PORT" operator central.txt 4 'watchdog/#'
sleep 1
pub "$GW_PORT" model-steam-flow plant/boiler/steam-flow/pred 'sensor-own-topic'
pub "$GW_PORT" meter-steam-flow plant/boiler/steam-flow/meter 'meter-own-topic'
pub "$GW_PORT" model-steam-flow plant/boiler/steam-flow/meter 'sensor-other-topic'
pub "$GW_PORT" watchdog-edge plant/boiler/steam-flow/pred 'agent-writes-inbound'
pub "$GW_PORT" watchdog-edge "$CMD" 'agent-writes-command'
pub "$GW_PORT" watchdog-edge watchdog/other/thing 'agent-writes-elsewhere'
pub "$GW_PORT" watchdog-edge watchdog/steam-flow/alerts 'alert-from-agent'
pub "$GW_PORT" watchdog-edge watchdog/steam-flow/state 'state-from-agent' -r
pub "$GW_PORT" viewer "$CMD" 'viewer-writes-command'
pub "$GW_PORT" operator "$CMD" 'operator-command-on-gateway'
pub "$CENTRAL_PORT" operator "$CMD" 'operator-command-from-central'
pub "$CENTRAL_PORT" bridge-boiler-house-1 watchdog/steam-flow/alerts 'central-alert-inward'
pub "$CENTRAL_PORT" bridge-boiler-house-1 watchdog/agents/boiler-house-1/commands/other 'central-other-inward'
for pid in "${SUBS[@]}"; do wait "$pid" || true; done

has agent.txt sensor-own-topic && pass "a sensor writes its own topic" || fail "a sensor's own topic did not arrive"
has agent.txt meter-own-topic && pass "the meter writes its own topic" || fail "the meter's own topic did not arrive"
has agent.txt sensor-other-topic && fail "a sensor wrote another sensor's topic" || pass "a sensor cannot write another sensor's topic"
has agent.txt agent-writes-inbound && fail "the agent wrote a sensor topic" || pass "the agent cannot write its inbound topics"
has agent.txt agent-writes-command && fail "the agent wrote its own command topic" || pass "the agent cannot write planned-work commands"
has operator.txt agent-writes-elsewhere && fail "the agent wrote outside its topics" || pass "the agent cannot publish outside its topics"
has operator.txt alert-from-agent && pass "the agent publishes alerts; operators read them" || fail "the agent's alert did not reach the operator"
has operator.txt state-from-agent && pass "the agent publishes state" || fail "the agent's state did not reach the operator"
has sensor.txt alert-from-agent && fail "a sensor read an alert" || pass "a sensor cannot read alerts"
has sensor.txt sensor-own-topic && fail "a sensor read sensor traffic" || pass "a sensor reads nothing"
has agent.txt viewer-writes-command && fail "a viewer sent a planned-work command" || pass "a viewer cannot send planned-work commands"
has agent.txt operator-command-on-gateway && pass "an operator sends planned-work commands" || fail "the operator's command did not reach the agent"
has central.txt alert-from-agent && pass "bridge: an alert raised on the gateway arrives on the central broker" \
  || fail "bridge: the alert did not reach the central broker"
has central.txt state-from-agent && pass "bridge: state arrives on the central broker" || fail "bridge: state did not arrive"
has agent.txt operator-command-from-central && pass "bridge: a command from the central broker reaches the agent" \
  || fail "bridge: the central command did not reach the agent"
has operator.txt central-alert-inward && fail "bridge: an alert came back from the central broker" \
  || pass "bridge: nothing but the command topic comes back"
has agent.txt central-other-inward && fail "bridge: another command topic came back" || pass "bridge: only the planned-work topic comes back"

# 3. The central broker keeps the forwarded state retained for readers that come later.
if mosquitto_sub -h 127.0.0.1 -p "$CENTRAL_PORT" -u viewer -P "$(pw viewer)" -t watchdog/steam-flow/state -C 1 -W 3 \
     2>/dev/null | grep -q state-from-agent; then
  pass "bridge: the state is retained on the central broker"
else
  fail "bridge: no retained state on the central broker"
fi

if [ "$FAILED" != 0 ]; then
  echo "deploy/check.sh: some rules do not hold; broker logs:" >&2
  tail -n 40 "$WORK/gateway.log" "$WORK/central.log" >&2 || true
  exit 1
fi
echo "deploy/check.sh: the ACL and the bridge hold"
