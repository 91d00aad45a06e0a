#!/usr/bin/env bash
# Install what the build and the tests need, only when it is missing:
# Debian packages, and a Python venv under build/venv with the pinned
# reference libraries (wheels cached under build/cache/pip so a rerun is
# fast).  The Kafka broker's jars are fetched by deploy/kafka-local.
set -euo pipefail
here=$(cd "$(dirname "$0")" && pwd)
top=$(cd "$here/../.." && pwd)
build=${BUILD:-build}
case "$build" in /*) ;; *) build="$top/$build" ;; esac
# Sanitizer builds live under build/asan; the venv stays in build/.
venvroot="$top/build"

apt_pkgs=(build-essential pkg-config librdkafka-dev libavro-dev libjansson-dev zlib1g-dev
          libuv1-dev libcmocka-dev libhttp-parser-dev kcat clang
          libclang-rt-14-dev prometheus chromium valgrind curl ca-certificates)
missing=()
command -v java >/dev/null || missing+=(openjdk-17-jre-headless)
command -v mvn >/dev/null || missing+=(maven)
command -v python3 >/dev/null || missing+=(python3 python3-venv)
for p in "${apt_pkgs[@]}"; do
    dpkg-query -W -f='${Status}' "$p" 2>/dev/null | grep -q "install ok installed" \
        || missing+=("$p")
done
if [ ${#missing[@]} -gt 0 ]; then
    echo "ensure-deps: installing Debian packages: ${missing[*]}"
    sudo_cmd=""
    [ "$(id -u)" -eq 0 ] || sudo_cmd="sudo"
    $sudo_cmd apt-get update -qq
    DEBIAN_FRONTEND=noninteractive $sudo_cmd apt-get install -y -qq \
        --no-install-recommends "${missing[@]}" >/dev/null
fi

venv="$venvroot/venv"
stamp="$venv/.requirements"
if [ ! -x "$venv/bin/python" ] || ! cmp -s "$here/requirements.txt" "$stamp"; then
    echo "ensure-deps: preparing Python venv in $venv"
    py=python3
    command -v "$py" >/dev/null || py=/usr/bin/python3
    "$py" -m venv "$venv"
    mkdir -p "$venvroot/cache/pip"
    PIP_CACHE_DIR="$venvroot/cache/pip" "$venv/bin/pip" install -q \
        --disable-pip-version-check -r "$here/requirements.txt"
    cp "$here/requirements.txt" "$stamp"
fi
