#!/usr/bin/env bash
# Install and start the sound server the sound-card tests play and record through.
#
#   bash .ci/setup-sound.sh          (CI runs it as root; by hand it uses sudo for apt-get)
#
# Idempotent: packages already there are not reinstalled, a running server is
# reused (the null sink is added to it if missing), and the monitor client is
# started only when it is not already running.
#
# What it sets up:
# - PulseAudio with tests/sound/pulse.pa: the native protocol and a float32
#   48 kHz null sink "livefilt_loop" (bit-exact loopback, no rewinds: see the
#   comment there).  --disable-shm=yes,
#   because the daemon crashed without it on this machine class.
# - /etc/alsa/conf.d/60-livefilt-loop.conf from tests/sound/asound-livefilt.conf:
#   an ALSA device "livefilt_loop" (playback to the sink, capture from its
#   monitor), so PortAudio's ALSA host API lists the loopback by name.
# - A low-latency recording client kept on the sink's monitor: without one the
#   null sink renders in 2 s chunks and the start of each recording is lost.
#
# PortAudio lists devices when sounddevice is imported: start this before the
# Python process that uses the devices (or re-initialise PortAudio).
set -euo pipefail

here="$(cd "$(dirname "${BASH_SOURCE[0]}")/.." && pwd)"
state=/tmp/livefilt-sound
sink=livefilt_loop
mkdir -p "$state"

as_root() {
    if [ "$(id -u)" -eq 0 ]; then "$@"; else sudo "$@"; fi
}

# -- packages ---------------------------------------------------------------
packages=(pulseaudio pulseaudio-utils libportaudio2 libasound2-plugins)
missing=()
for p in "${packages[@]}"; do
    dpkg-query -W -f='${Status}' "$p" 2>/dev/null | grep -q "install ok installed" || missing+=("$p")
done
if [ "${#missing[@]}" -gt 0 ]; then
    echo "setup-sound: installing ${missing[*]}"
    # another apt-get may hold the lock (other setup scripts): wait for it
    as_root apt-get -o DPkg::Lock::Timeout=600 update -qq
    as_root env DEBIAN_FRONTEND=noninteractive apt-get -o DPkg::Lock::Timeout=600 \
        install -y -qq --no-install-recommends "${missing[@]}"
fi

# -- ALSA name for the loopback -------------------------------------------------
conf=/etc/alsa/conf.d/60-livefilt-loop.conf
if ! cmp -s "$here/tests/sound/asound-livefilt.conf" "$conf"; then
    as_root install -m 644 "$here/tests/sound/asound-livefilt.conf" "$conf"
fi

# -- server -------------------------------------------------------------------
if ! pactl info >/dev/null 2>&1; then
    echo "setup-sound: starting PulseAudio (log: $state/pulse.log)"
    pulseaudio --daemonize=yes --exit-idle-time=-1 --disable-shm=yes \
        -n --file="$here/tests/sound/pulse.pa" --log-target="file:$state/pulse.log"
    for _ in $(seq 50); do
        pactl info >/dev/null 2>&1 && break
        sleep 0.1
    done
    pactl info >/dev/null 2>&1 || { echo "setup-sound: PulseAudio did not start" >&2;
                                    tail -20 "$state/pulse.log" >&2; exit 1; }
fi
if ! pactl list short sinks | grep -q "^[0-9]*[[:space:]]$sink[[:space:]]"; then
    # a server we did not start (a desktop session): add our sink to it
    pactl load-module module-null-sink sink_name=$sink format=float32le rate=48000 \
        channels=2 channel_map=front-left,front-right norewinds=1 \
        sink_properties=device.description=livefilt-loop >/dev/null
fi

# -- keep a low-latency client on the monitor --------------------------------------
if ! { [ -f "$state/monitor.pid" ] && kill -0 "$(cat "$state/monitor.pid")" 2>/dev/null; }; then
    setsid nohup pacat --record --device="$sink.monitor" --latency-msec=5 \
        --format=float32le --rate=48000 --channels=2 >/dev/null 2>>"$state/monitor.log" &
    echo $! >"$state/monitor.pid"
fi

echo "setup-sound: ready: sink $sink ($(pactl get-default-sink 2>/dev/null || echo '?') is default)," \
     "monitor client pid $(cat "$state/monitor.pid")"
