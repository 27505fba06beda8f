#!/usr/bin/env bash
# Install what the reference firmware build and its simulator host need:
# the AVR cross toolchain (gcc-avr, binutils-avr, avr-libc), the simulator
# library and headers (simavr, libsimavr-dev), a host C compiler, make and
# pkg-config.  Idempotent: does nothing when everything is present.
# Run as root (CI does); on a laptop run it with sudo.
set -euo pipefail

packages=(gcc-avr binutils-avr avr-libc simavr libsimavr-dev libelf-dev gcc make pkg-config)

missing=()
for p in "${packages[@]}"; do
    if ! dpkg-query -W -f='${Status}' "$p" 2>/dev/null | grep -q "install ok installed"; then
        missing+=("$p")
    fi
done

if [ ${#missing[@]} -eq 0 ]; then
    echo "setup-firmware: all present (${packages[*]})"
    exit 0
fi

echo "setup-firmware: installing ${missing[*]}"
export DEBIAN_FRONTEND=noninteractive
apt-get update -qq
apt-get install -y -qq --no-install-recommends "${missing[@]}"
