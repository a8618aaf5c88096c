#!/usr/bin/env bash
# Installs mdpserve's build and test dependencies from Debian's packages.
# Idempotent and non-interactive: safe to run again; does nothing when all are present.
#   bash scripts/install-deps.sh [EXTRA_PACKAGE...]
# Extra packages are installed with the others (scripts/fuzz.sh adds clang and libomp-dev).
set -euo pipefail

packages=(
  build-essential cmake pkg-config
  nlohmann-json3-dev libeigen3-dev libspdlog-dev libfmt-dev
  libgtest-dev libgmock-dev googletest libbenchmark-dev
  libcpp-httplib-dev libcli11-dev libsqlite3-dev libssl-dev zlib1g-dev libbrotli-dev
  libsimdjson-dev
  wrk nginx-light curl
  python3 python3-scipy python3-numpy python3-jsonschema
  "$@"
)

missing=()
for p in "${packages[@]}"; do
  if ! dpkg-query -W -f='${Status}' "$p" 2>/dev/null | grep -q "install ok installed"; then
    missing+=("$p")
  fi
done

if [ ${#missing[@]} -eq 0 ]; then
  echo "install-deps: all ${#packages[@]} packages present"
  exit 0
fi

SUDO=""
if [ "$(id -u)" -ne 0 ]; then SUDO="sudo"; fi
export DEBIAN_FRONTEND=noninteractive
echo "install-deps: installing ${missing[*]}"
$SUDO apt-get update -qq
$SUDO apt-get install -y -qq --no-install-recommends "${missing[@]}" >/dev/null
echo "install-deps: done"
