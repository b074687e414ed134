# Sourced by .ci/run (". .ci/services.sh"): installs and starts the services
# the store tests need, and exports where they are.
#
#   docker-registry (Debian's package, distribution 2.8) on a free loopback
#   port with htpasswd basic auth; exports MODELGATE_TEST_REGISTRY (host:port),
#   MODELGATE_TEST_REGISTRY_USER, MODELGATE_TEST_REGISTRY_PASSWORD,
#   MODELGATE_REGISTRY_PID and MODELGATE_REQUIRE_SERVICES=1 (tests that need
#   a service then fail instead of skipping in CI).
#
# Idempotent: sourcing it again while the registry it started still answers
# reuses it. The caller stops it when done: the registry's PID is in
# $MODELGATE_REGISTRY_PID (.ci/run sets an EXIT trap that kills it).
# The GCS emulator needs nothing here: the tests run fake-gcs-server
# in-process on a loopback port.

_mg_services() {
  local need=() pkg
  for pkg in docker-registry apache2-utils; do
    dpkg-query -W -f='${Status}' "$pkg" 2>/dev/null | grep -q "install ok installed" || need+=("$pkg")
  done
  if ((${#need[@]})); then
    DEBIAN_FRONTEND=noninteractive apt-get update -qq
    DEBIAN_FRONTEND=noninteractive apt-get install -y -qq --no-install-recommends "${need[@]}" >/dev/null
  fi

  if [[ -n "${MODELGATE_REGISTRY_PID:-}" && -n "${MODELGATE_TEST_REGISTRY:-}" ]] &&
    kill -0 "$MODELGATE_REGISTRY_PID" 2>/dev/null &&
    curl -fsS -o /dev/null -u "$MODELGATE_TEST_REGISTRY_USER:$MODELGATE_TEST_REGISTRY_PASSWORD" "http://$MODELGATE_TEST_REGISTRY/v2/"; then
    echo "services: docker-registry already running at $MODELGATE_TEST_REGISTRY (pid $MODELGATE_REGISTRY_PID)"
    return 0
  fi

  local dir port user=modelgate-ci password
  dir=$(mktemp -d "${TMPDIR:-/tmp}/modelgate-registry.XXXXXX")
  password=$(head -c 18 /dev/urandom | base64 | tr -d '/+=')
  # A free port: the first of 5000..5999 nothing listens on.
  for port in $(seq 5000 5999); do
    (exec 3<>"/dev/tcp/127.0.0.1/$port") 2>/dev/null || break
  done
  htpasswd -Bbn "$user" "$password" >"$dir/htpasswd"
  mkdir -p "$dir/data"
  cat >"$dir/config.yml" <<YAML
version: 0.1
log:
  level: error
  accesslog:
    disabled: true
storage:
  filesystem:
    rootdirectory: $dir/data
  delete:
    enabled: true
http:
  addr: 127.0.0.1:$port
auth:
  htpasswd:
    realm: modelgate-ci
    path: $dir/htpasswd
YAML
  docker-registry serve "$dir/config.yml" >"$dir/registry.log" 2>&1 &
  local pid=$!
  local i
  for i in $(seq 1 100); do
    if curl -fsS -o /dev/null -u "$user:$password" "http://127.0.0.1:$port/v2/" 2>/dev/null; then
      break
    fi
    if ! kill -0 "$pid" 2>/dev/null; then
      echo "services: docker-registry exited:" >&2
      cat "$dir/registry.log" >&2
      return 1
    fi
    sleep 0.1
  done
  if ! curl -fsS -o /dev/null -u "$user:$password" "http://127.0.0.1:$port/v2/"; then
    echo "services: docker-registry did not answer on 127.0.0.1:$port" >&2
    kill "$pid" 2>/dev/null
    return 1
  fi
  export MODELGATE_TEST_REGISTRY="127.0.0.1:$port"
  export MODELGATE_TEST_REGISTRY_USER="$user"
  export MODELGATE_TEST_REGISTRY_PASSWORD="$password"
  export MODELGATE_REGISTRY_PID="$pid"
  export MODELGATE_REGISTRY_DIR="$dir"
  export MODELGATE_REQUIRE_SERVICES=1
  echo "services: docker-registry at $MODELGATE_TEST_REGISTRY (pid $pid, data in $dir)"
}

_mg_services
