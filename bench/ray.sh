#!/usr/bin/env bash
# Shards on Ray against one `index` run of the same files, in one run: the demo collection (or
# the folder given) indexed by `vitrine index` on both cores, then embedded by tools/ray-index as
# PARTS parts on a local two-node Ray cluster (one CPU per node, one CPU per task) and merged.
# On 2 cores expect parity; the gap is what the shard files, the merge and Ray add.
# Ray runs in network and process namespaces of its own (unshare, as root): only loopback, so
# nothing it starts listens or connects anywhere else, and `ray stop` sees only this cluster. Needs the .venv of tools/test-all (ray).
set -euo pipefail
cd "$(dirname "$0")/.."
root=$(pwd)
python="${VITRINE_PYTHON:-$root/.venv/bin/python}"
ray="$(dirname "$python")/ray"
vitrine="$root/target/release/vitrine"
folder="${1:-demo-images}"
parts="${PARTS:-4}"
work=$(mktemp -d)
trap 'rm -rf "$work"' EXIT
cargo build -q --release -p vitrine-cli

start=$(date +%s.%N)
"$vitrine" --store "$work/indexed" index "$folder" >/dev/null 2>&1
index_s=$(echo "$(date +%s.%N) - $start" | bc)
images=$("$vitrine" --store "$work/indexed" status --format json | "$python" -c 'import json,sys; print(json.load(sys.stdin)["images"])')

start=$(date +%s.%N)
unshare --net --pid --fork --kill-child --mount-proc bash -c '
  set -euo pipefail
  ip link set lo up
  export RAY_USAGE_STATS_ENABLED=0
  ray="$1"; shift
  trap "\"$ray\" stop --force >/dev/null 2>&1 || true" EXIT
  common=(--node-ip-address=127.0.0.1 --num-cpus=1 --disable-usage-stats --object-store-memory=100000000)
  "$ray" start --head --port=6379 --include-dashboard=false "${common[@]}" >/dev/null
  "$ray" start --address=127.0.0.1:6379 "${common[@]}" >/dev/null
  "$@"
' ray-bench "$ray" "$python" tools/ray-index --address 127.0.0.1:6379 --node-ip-address 127.0.0.1 \
  --parts "$parts" --cpus-per-task 1 --out "$work/shards" --store "$work/merged" \
  --vitrine "$vitrine" --summary "$work/summary.json" "$folder" >"$work/ray.log" 2>&1 \
  || { cat "$work/ray.log" >&2; exit 1; }
ray_s=$(echo "$(date +%s.%N) - $start" | bc)
tasks_s=$("$python" -c 'import json,sys; print(sum(s["wall_seconds"] for s in json.load(open(sys.argv[1]))["shards"]))' "$work/summary.json")

simd=$(grep -m1 '^flags' /proc/cpuinfo | grep -ow 'avx2\|fma\|avx512f\|avx512_vnni\|avx512_bf16' | sort -u | xargs)
echo "# shards on Ray against one index run — $(grep -m1 'model name' /proc/cpuinfo | cut -d: -f2 | xargs) ($simd), $(nproc) cores"
echo
echo "| run | wall s | images/s | ratio |"
echo "|---|---:|---:|---:|"
printf '| `vitrine index`, both cores | %.1f | %.2f | 1.00 |\n' "$index_s" "$(echo "$images / $index_s" | bc -l)"
printf '| tools/ray-index, %s parts on 2 one-CPU nodes, with cluster start and merge | %.1f | %.2f | %.2f |\n' \
  "$parts" "$ray_s" "$(echo "$images / $ray_s" | bc -l)" "$(echo "$index_s / $ray_s" | bc -l)"
printf '| the %s tasks alone (sum of their wall times / 2 nodes) | %.1f | %.2f | %.2f |\n' \
  "$parts" "$(echo "$tasks_s / 2" | bc -l)" "$(echo "$images * 2 / $tasks_s" | bc -l)" "$(echo "$index_s * 2 / $tasks_s" | bc -l)"
