#!/usr/bin/env bash
# HTTP service throughput and latency with wrk (Debian package `wrk`):
# neighbours of an indexed image (GET) and search by uploaded image (POST of
# a JPEG, one forward pass each) at 1, 8 and 32 connections, on the demo
# collection padded with synthetic embeddings to BENCH_IMAGES images (default
# 100,000; the padding's files do not exist, which only thumbnails would
# notice). Prints requests/s and p50/p99 latency. Not a test.
# BENCH_SECONDS sets each neighbour run's length (default 10) and
# BENCH_UPLOAD_SECONDS each upload run's (default 40: at 32 connections a
# round of forward passes takes longer than 10 s on a small machine, and wrk
# counts only requests that finish within the run).
set -euo pipefail
cd "$(dirname "$0")/.."
seconds="${BENCH_SECONDS:-10}"
target_images="${BENCH_IMAGES:-100000}"
upload_seconds="${BENCH_UPLOAD_SECONDS:-40}"
if ! command -v wrk >/dev/null; then
  if [ "$(id -u)" = 0 ]; then
    apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq wrk >/dev/null
  else
    echo "wrk is needed (apt-get install wrk)" >&2
    exit 1
  fi
fi
cargo build -q --release -p vitrine-cli
vitrine=$(pwd)/target/release/vitrine
work=$(mktemp -d)
server_pid=
cleanup() {
  if [ -n "$server_pid" ]; then kill "$server_pid" 2>/dev/null || true; wait "$server_pid" 2>/dev/null || true; fi
  rm -rf "$work"
}
trap cleanup EXIT

"$vitrine" --store "$work/store" index demo-images >/dev/null 2>&1
indexed=$("$vitrine" --store "$work/store" status --format json | grep -o '"images": *[0-9]*' | head -1 | grep -o '[0-9]*$')
if [ "$target_images" -gt "$indexed" ]; then
  cargo run -q --release -p vitrine-store --example pad_store -- "$work/store" $(( target_images - indexed )) >&2
fi
# No background precomputation of duplicate reports during the measurement.
printf '[serve]\nprecompute = false\n' >"$work/vitrine.toml"
port=$(( 20000 + RANDOM % 20000 ))
VITRINE_CONFIG="$work/vitrine.toml" "$vitrine" --store "$work/store" serve --port "$port" >"$work/serve.log" 2>&1 &
server_pid=$!
base="http://127.0.0.1:$port"
for _ in $(seq 100); do
  curl -sf "$base/healthz" >/dev/null && break
  sleep 0.2
done
collection=$(curl -sf "$base/api/v1/collections" | sed -E 's/.*"name":"([^"]+)".*/\1/')
query=$(find demo-images -name '*.jpg' | sort | head -1)
images=$(curl -sf "$base/api/v1/collections/$collection/status" | sed -E 's/.*"images":([0-9]+).*/\1/')

cat >"$work/upload.lua" <<LUA
local f = assert(io.open("$query", "rb"))
wrk.method = "POST"
wrk.body = f:read("*a")
f:close()
wrk.headers["Content-Type"] = "image/jpeg"
LUA

# Neighbour queries start from a random indexed image each, so that the
# search does not run on one hot path of the graph.
{
  echo "ids = {"
  for page in $(seq 1 $(( (images + 499) / 500 ))); do
    curl -sf "$base/api/v1/collections/$collection/images?per_page=500&page=$page" |
      grep -o '"id":[0-9]*' | cut -d: -f2 | sed 's/$/,/'
  done
  echo "}"
} >"$work/ids.lua"
cat >"$work/neighbours.lua" <<LUA
dofile("$work/ids.lua")
math.randomseed(7)
request = function()
  return wrk.format("GET", "/api/v1/collections/$collection/images/" .. ids[math.random(#ids)] .. "/neighbours?k=10")
end
LUA

# Latency lines of `wrk --latency` look like "     50%    1.23ms".
to_ms() {
  awk -v v="$1" 'BEGIN {
    n = v + 0; u = v; sub(/^[0-9.]+/, "", u);
    if (u == "us") n /= 1000; else if (u == "s") n *= 1000; else if (u == "m") n *= 60000;
    printf "%.2f", n }'
}

echo "$images images, $(nproc) cores; neighbour runs ${seconds} s, upload runs ${upload_seconds} s"
echo
echo "| request | connections | requests/s | p50 ms | p99 ms | errors |"
echo "|---|---:|---:|---:|---:|---:|"
for kind in neighbours upload; do
  for connections in 1 8 32; do
    threads=$(( connections < 2 ? 1 : 2 ))
    if [ "$kind" = neighbours ]; then
      out=$(wrk -t"$threads" -c"$connections" -d"${seconds}s" --latency \
        -s "$work/neighbours.lua" "$base")
    else
      out=$(wrk -t"$threads" -c"$connections" -d"${upload_seconds}s" --latency --timeout 30s \
        -s "$work/upload.lua" "$base/api/v1/collections/$collection/search?k=10")
    fi
    rps=$(echo "$out" | awk '/Requests\/sec/ {print $2}')
    p50=$(to_ms "$(echo "$out" | awk '$1 == "50%" {print $2}')")
    p99=$(to_ms "$(echo "$out" | awk '$1 == "99%" {print $2}')")
    errors=$(echo "$out" | awk '/Non-2xx|Socket errors/ {s = s $0 "; "} END {print (s == "" ? "0" : s)}')
    echo "| $kind | $connections | $rps | $p50 | $p99 | $errors |"
  done
done
