#!/usr/bin/env bash
# Out-of-core proof: ingest and train on growing amounts of generated text and
# record, for each size, the seconds per GB and the peak anonymous memory
# (RssAnon, sampled from /proc/PID/status every 10 ms; mapped shard pages are
# the page cache's and are not counted). Linear cost means constant seconds per
# GB; bounded memory means the same peak RssAnon at every size.
#
# Usage: benches/out-of-core.sh [SIZE_GB ...]        (default: 0.25 1 4 12)
# Environment:
#   WORK=DIR       where inputs and datasets go (default /tmp/tamis-ooc); each
#                  size needs about 3x its size of free disk while it runs
#                  (text + shards), and is removed before the next size
#   THREADS=N      threads for ingest and train (default: all cores)
#   EPOCHS=E       training epochs (default 2; the second one is averaged)
#   TASK=binary|multi   binary hinge (--positive spam, default) or 6-class
#   TAMIS=PATH     the tamis binary (default target/release/tamis)
#   SYNTH=PATH     the generator (default target/release/examples/synth)
#   SYNC=1         ingest with the default fsync of every shard (default: --no-sync)
# Build first: cargo build --release --bins --examples
# Output: one line per size on stdout, a Markdown table row; progress on stderr.
set -euo pipefail

root=$(cd "$(dirname "$0")/.." && pwd)
tamis=${TAMIS:-$root/target/release/tamis}
synth=${SYNTH:-$root/target/release/examples/synth}
work=${WORK:-/tmp/tamis-ooc}
threads=${THREADS:-$(nproc)}
epochs=${EPOCHS:-2}
task=${TASK:-binary}
sizes=("$@")
[ ${#sizes[@]} -gt 0 ] || sizes=(0.25 1 4 12)
for b in "$tamis" "$synth"; do
  [ -x "$b" ] || { echo "error: $b not found; run cargo build --release --bins --examples" >&2; exit 1; }
done

# Run a command, sampling its RssAnon; sets $secs and $peak_mib.
measure() {
  local start end pid kb peak=0
  start=$(date +%s.%N)
  "$@" &
  pid=$!
  while kill -0 "$pid" 2>/dev/null; do
    kb=$(awk '/^RssAnon:/ {print $2}' "/proc/$pid/status" 2>/dev/null || true)
    if [ -n "${kb:-}" ] && [ "$kb" -gt "$peak" ]; then peak=$kb; fi
    sleep 0.01
  done
  wait "$pid"
  end=$(date +%s.%N)
  secs=$(echo "$end - $start" | bc -l)
  peak_mib=$(echo "$peak / 1024" | bc -l)
}

ingest_extra=(--quiet)
[ "${SYNC:-0}" = 1 ] || ingest_extra+=(--no-sync)
[ "$task" = binary ] && ingest_extra+=(--positive spam)

mkdir -p "$work"
echo "| text GB | rows | nnz | shards GB | ingest s | ingest s/GB | ingest RssAnon MiB | train s ($epochs epochs) | train s/GB per epoch | train RssAnon MiB | load avg |"
echo "|---|---|---|---|---|---|---|---|---|---|---|"
for gb in "${sizes[@]}"; do
  bytes=$(printf '%.0f' "$(echo "$gb * 1000000000" | bc -l)")
  input=$work/inbox-$gb.tsv
  ds=$work/ds-$gb
  rm -rf "$ds" "$ds.tmm"
  echo "out-of-core: generating $gb GB" >&2
  "$synth" "$bytes" > "$input"
  load=$(cut -d' ' -f1 /proc/loadavg)
  echo "out-of-core: ingest $gb GB" >&2
  measure "$tamis" ingest "$input" --out "$ds" -j "$threads" "${ingest_extra[@]}"
  ingest_s=$secs; ingest_mib=$peak_mib
  rm -f "$input"
  stats=$("$tamis" stats "$ds" --json)
  rows=$(echo "$stats" | sed -n 's/^  "rows": \([0-9]*\).*/\1/p' | head -1)
  nnz=$(echo "$stats" | sed -n 's/^  "nnz": \([0-9]*\).*/\1/p' | head -1)
  shard_bytes=$(du -sb "$ds" | cut -f1)
  echo "out-of-core: train $gb GB, $epochs epochs" >&2
  measure "$tamis" train "$ds" --model "$ds.tmm" -j "$threads" --epochs "$epochs" --quiet
  train_s=$secs; train_mib=$peak_mib
  printf '| %s | %s | %s | %.2f | %.1f | %.1f | %.0f | %.1f | %.1f | %.0f | %s |\n' \
    "$gb" "$rows" "$nnz" "$(echo "$shard_bytes / 1000000000" | bc -l)" \
    "$ingest_s" "$(echo "$ingest_s / $gb" | bc -l)" "$ingest_mib" \
    "$train_s" "$(echo "$train_s / $gb / $epochs" | bc -l)" "$train_mib" "$load"
  rm -rf "$ds" "$ds.tmm"
done
