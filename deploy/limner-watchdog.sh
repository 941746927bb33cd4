#!/usr/bin/env bash
# Restart the show when its heartbeat file goes stale (the process is alive but stuck).
# Run from cron or a systemd timer every minute:  */1 * * * * ~/limner/deploy/limner-watchdog.sh
set -u
beat="${XDG_RUNTIME_DIR:-/run/user/$(id -u)}/limner-heartbeat"
max_age=${1:-30}
if [ -f "$beat" ]; then
  age=$(( $(date +%s) - $(stat -c %Y "$beat") ))
  if [ "$age" -gt "$max_age" ]; then
    logger -t limner-watchdog "heartbeat ${age}s old: restarting limner-show"
    systemctl --user restart limner-show.service
  fi
fi
