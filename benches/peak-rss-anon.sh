#!/usr/bin/env bash
# Run a command and report its wall time and peak anonymous resident memory
# (RssAnon, sampled from /proc every 10 ms; mapped file pages are not counted).
# Usage: benches/peak-rss-anon.sh COMMAND [ARGS...]
set -u
start=$(date +%s.%N)
"$@" &
pid=$!
peak=0
while kill -0 "$pid" 2>/dev/null; do
  kb=$(awk '/^RssAnon:/ {print $2}' "/proc/$pid/status" 2>/dev/null || true)
  if [ -n "${kb:-}" ] && [ "$kb" -gt "$peak" ]; then peak=$kb; fi
  sleep 0.01
done
wait "$pid"
rc=$?
end=$(date +%s.%N)
printf 'wall_seconds=%.3f peak_rss_anon_mib=%.1f exit=%d\n' "$(echo "$end - $start" | bc)" "$(echo "$peak / 1024" | bc -l)" "$rc" >&2
exit $rc
