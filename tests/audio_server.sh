#!/usr/bin/env bash
# Start (or restart) a PulseAudio server with a null sink whose monitor is the default input,
# for the live-capture tests. Usage: tests/audio_server.sh start|stop
set -u
case "${1:-start}" in
  stop)
    pulseaudio -k 2>/dev/null || pkill -x pulseaudio 2>/dev/null || true
    ;;
  start)
    if ! pactl info >/dev/null 2>&1; then
      pulseaudio --daemonize=yes --exit-idle-time=-1 -n \
        --load="module-null-sink sink_name=scenemon_test rate=44100" \
        --load=module-native-protocol-unix --log-target=stderr 2>/dev/null
      for _ in $(seq 50); do pactl info >/dev/null 2>&1 && break; sleep 0.1; done
    fi
    pactl set-default-sink scenemon_test >/dev/null 2>&1 || true
    pactl set-default-source scenemon_test.monitor >/dev/null 2>&1 || true
    pactl info >/dev/null 2>&1
    ;;
esac
