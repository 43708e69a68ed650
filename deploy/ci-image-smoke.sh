#!/usr/bin/env bash
# Build the service image and smoke-test it, on a machine that reaches no container registry.
#
# 1. a Docker engine: the one already answering, else dockerd from Debian's docker.io package, started
#    here on a socket of its own and stopped (by its PID) on exit;
# 2. the base image lytestream-base:local, made once by debootstrap (Debian bookworm, minbase, python3,
#    python3-venv) and `docker import` (skipped when the image exists);
# 3. wheels of the package and its dependencies built on the host (`pip wheel . -w wheels`), so the
#    image build itself needs no network;
# 4. the container: it must refuse 0.0.0.0 without LYTESTREAM_BASE_URL, then serve /fhir/metadata as a
#    non-root user, take one ingest with a token minted inside it (and raise the Flag the result calls
#    for), and answer /readyz.
#
# When no engine can run here (no package, or dockerd will not start), it says why and exits 0:
# the image is then not checked on this machine, and the message says so. Any other failure is red.
set -euo pipefail
cd "$(dirname "$0")/.."

BASE_IMAGE=lytestream-base:local
IMAGE=lytestream:ci-smoke
NAME=lytestream-ci-smoke
STATE=${LYTESTREAM_SMOKE_STATE:-${XDG_CACHE_HOME:-$HOME/.cache}/lytestream/ci-docker}
PY=${PYTHON:-$( [ -x .venv/bin/python ] && echo .venv/bin/python || echo python3 )}
started=$(date +%s)
DOCKERD_PID=""

say() { echo "image smoke: $*" >&2; }
skip() { say "SKIPPED — $*"; exit 0; }
since() { echo "$(( $(date +%s) - $1 )) s"; }

cleanup() {
  docker rm -f "$NAME" >/dev/null 2>&1 || true
  if [ -n "$DOCKERD_PID" ] && kill -0 "$DOCKERD_PID" 2>/dev/null; then
    kill "$DOCKERD_PID" 2>/dev/null || true
    for _ in $(seq 1 30); do kill -0 "$DOCKERD_PID" 2>/dev/null || break; sleep 0.5; done
    kill -9 "$DOCKERD_PID" 2>/dev/null || true
    say "dockerd (pid $DOCKERD_PID) stopped"
  fi
}
trap cleanup EXIT

# --- 1. an engine ---------------------------------------------------------------------------------
if ! docker info >/dev/null 2>&1; then
  if ! command -v dockerd >/dev/null; then
    if [ "$(id -u)" = 0 ] && command -v apt-get >/dev/null; then
      say "installing Debian's docker.io (dockerd)"
      DEBIAN_FRONTEND=noninteractive apt-get install -y -q docker.io >/dev/null 2>&1 \
        || { apt-get update -q >/dev/null 2>&1 && DEBIAN_FRONTEND=noninteractive apt-get install -y -q docker.io >/dev/null 2>&1; } \
        || skip "dockerd is not installed and apt-get could not install docker.io"
    else
      skip "dockerd is not installed (Debian package docker.io) and this user cannot install it"
    fi
  fi
  mkdir -p "$STATE"
  export DOCKER_HOST="unix://$STATE/docker.sock"
  # No bridge and no iptables: the container shares the host's network, so the engine needs no
  # netfilter rights. Images stay in the default data root, so the base is made once per machine.
  dockerd --host "$DOCKER_HOST" --pidfile "$STATE/docker.pid" --exec-root "$STATE/exec" \
          --bridge=none --iptables=false --ip6tables=false >"$STATE/dockerd.log" 2>&1 &
  DOCKERD_PID=$!
  for _ in $(seq 1 60); do docker info >/dev/null 2>&1 && break; kill -0 "$DOCKERD_PID" 2>/dev/null || break; sleep 0.5; done
  if ! docker info >/dev/null 2>&1; then
    reason=$(grep -iE "error|fail" "$STATE/dockerd.log" | tail -n 1 || true)
    DOCKERD_PID_DEAD=$DOCKERD_PID
    cleanup; DOCKERD_PID=""
    skip "dockerd (pid $DOCKERD_PID_DEAD) did not start: ${reason:-no reason logged} (log: $STATE/dockerd.log)"
  fi
  say "dockerd started (pid $DOCKERD_PID, storage $(docker info --format '{{.Driver}}')) in $(since "$started")"
fi

# --- 2. the base image ----------------------------------------------------------------------------
t=$(date +%s)
if docker image inspect "$BASE_IMAGE" >/dev/null 2>&1; then
  say "base $BASE_IMAGE present"
else
  command -v debootstrap >/dev/null || DEBIAN_FRONTEND=noninteractive apt-get install -y -q debootstrap >/dev/null
  root=$(mktemp -d "$STATE/rootfs.XXXXXX")
  debootstrap --variant=minbase --include=python3,python3-venv,ca-certificates bookworm "$root" \
    >"$STATE/debootstrap.log" 2>&1 || { tail -n 20 "$STATE/debootstrap.log" >&2; exit 1; }
  tar -C "$root" -c . | docker import - "$BASE_IMAGE" >/dev/null
  rm -rf "$root"
  say "base $BASE_IMAGE made by debootstrap in $(since "$t")"
fi

# --- 3. wheels, then the image ---------------------------------------------------------------------
t=$(date +%s)
rm -f wheels/lytestream-*.whl  # the package itself is rebuilt every time; dependencies are kept
"$PY" -m pip wheel --quiet --disable-pip-version-check . -w wheels 2> >(grep -v "is ignored" >&2)
say "wheels built in $(since "$t")"
t=$(date +%s)
# The legacy builder: Debian's engine has no buildx, and the Dockerfile needs nothing newer.
DOCKER_BUILDKIT=0 docker build --quiet --build-arg BASE="$BASE_IMAGE" -t "$IMAGE" . >"$STATE/build.log" 2>&1 \
  || { tail -n 30 "$STATE/build.log" >&2; say "FAIL: the image did not build"; exit 1; }
# The previous build's image, untagged now; only on an engine of our own (another's images are not ours).
[ -z "$DOCKERD_PID" ] || docker image prune -f >/dev/null
say "image $IMAGE built in $(since "$t") ($(docker image inspect "$IMAGE" --format '{{.Size}}' | awk '{printf "%.0f MB", $1/1e6}'))"

# --- 4. the container ------------------------------------------------------------------------------
t=$(date +%s)
PORT=$("$PY" -c 'import socket; s=socket.socket(); s.bind(("127.0.0.1", 0)); print(s.getsockname()[1])')
BASE="http://127.0.0.1:$PORT/fhir"

# Without the public base URL, listening on every interface is refused with one line and exit 2.
set +e
refusal=$(docker run --rm --network host "$IMAGE" lytestream serve --host 0.0.0.0 --port "$PORT" 2>&1)
code=$?
set -e
[ "$code" = 2 ] && [[ "$refusal" == *LYTESTREAM_BASE_URL* ]] \
  || { say "FAIL: serve on 0.0.0.0 without LYTESTREAM_BASE_URL exited $code: $refusal"; exit 1; }

docker run -d --name "$NAME" --network host -e LYTESTREAM_BASE_URL="$BASE" "$IMAGE" \
  lytestream serve --host 0.0.0.0 --port "$PORT" >/dev/null
up=""
for _ in $(seq 1 60); do
  if curl -fs -o /dev/null "$BASE/metadata"; then up=1; break; fi
  [ "$(docker inspect -f '{{.State.Running}}' "$NAME")" = true ] || break
  sleep 0.5
done
[ -n "$up" ] || { docker logs "$NAME" >&2 || true; say "FAIL: /fhir/metadata did not answer"; exit 1; }
curl -fsS "$BASE/metadata" | grep -q '"resourceType":"CapabilityStatement"' \
  || { say "FAIL: /fhir/metadata is not a CapabilityStatement"; exit 1; }
uid=$(docker exec "$NAME" id -u)
[ "$uid" != 0 ] || { say "FAIL: the service runs as root"; exit 1; }

# One ingest, with a token minted inside the container. Sodium 115 mmol/L is below the default critical
# low of 120 mmol/L (RCPath G158 2017), so the result must raise a Flag. Invented patient.
token=$(docker exec "$NAME" lytestream token create --client ci-smoke --scope 'system/*.cruds' 2>/dev/null)
when=$(date -u -d '-1 hour' +%Y-%m-%dT%H:%M:%S+00:00)
body='{"resourceType":"Bundle","type":"transaction","entry":[{"request":{"method":"POST","url":"Observation"},
 "resource":{"resourceType":"Observation","identifier":[{"system":"https://lab.example.org/result-id","value":"smoke-1"}],
 "status":"final","code":{"coding":[{"system":"http://loinc.org","code":"2951-2"}]},
 "subject":{"reference":"Patient/smoke-p1"},"effectiveDateTime":"'"$when"'",
 "valueQuantity":{"value":115,"unit":"mmol/L","system":"http://unitsofmeasure.org","code":"mmol/L"}}}]}'
status=$(curl -sS -o "$STATE/ingest.json" -w '%{http_code}' -X POST "$BASE" \
  -H "Authorization: Bearer $token" -H 'Content-Type: application/fhir+json' --data-binary "$body")
[ "$status" = 200 ] || { cat "$STATE/ingest.json" >&2; say "FAIL: ingest answered $status"; exit 1; }
flags=$(curl -fsS "$BASE/Flag?status=active" -H "Authorization: Bearer $token")
[[ "$flags" == *sodium-critical-low* ]] || { echo "$flags" >&2; say "FAIL: the ingest raised no Flag"; exit 1; }

# /readyz where the image serves it (it answers 404 only on a build from before it existed).
ready=$(curl -s -o /dev/null -w '%{http_code}' "http://127.0.0.1:$PORT/readyz")
case "$ready" in
  200) readyz="ready" ;;
  404) readyz="absent (checked /fhir/metadata instead)" ;;
  *) say "FAIL: /readyz answered $ready"; exit 1 ;;
esac
say "container: metadata, ingest (Flag raised), uid $uid, /readyz $readyz in $(since "$t")"
say "OK in $(since "$started") in all"
