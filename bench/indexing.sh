#!/usr/bin/env bash
# End-to-end indexing throughput: the demo collection, and camera-size JPEGs
# (4 MP, made from public-domain sample photos by upscaling). Prints the
# phase split reported by `vitrine index` (decode, forward, store).
set -euo pipefail
cd "$(dirname "$0")/.."
vitrine=target/release/vitrine
work=$(mktemp -d)
trap 'rm -rf "$work"' EXIT

"${VITRINE_PYTHON:-python3}" - "$work/camera" <<'PY'
import os, sys, skimage
from PIL import Image
out = sys.argv[1]; os.makedirs(out, exist_ok=True)
data = os.path.join(os.path.dirname(skimage.__file__), "data")
names = ["astronaut.png", "chelsea.png", "coffee.png", "rocket.jpg", "motorcycle_left.png", "hubble_deep_field.jpg"]
for i in range(48):
    im = Image.open(os.path.join(data, names[i % len(names)])).convert("RGB")
    im = im.resize((2304, 1728), Image.BICUBIC).rotate(i % 7, expand=False)
    im.save(os.path.join(out, f"photo-{i:03}.jpg"), quality=90)
PY

echo "| collection | images | wall s | images/s | decode s | forward s | store s |"
echo "|---|---:|---:|---:|---:|---:|---:|"
for name in demo camera; do
  src=demo-images; [ "$name" = camera ] && src="$work/camera"
  start=$(date +%s.%N)
  out=$($vitrine --store "$work/store-$name" index "$src" 2>/dev/null)
  end=$(date +%s.%N)
  n=$(echo "$out" | grep -o '^[0-9]* new' | cut -d' ' -f1)
  times=$(echo "$out" | grep '^time:' | grep -o '[0-9.]* s' | cut -d' ' -f1 | tr '\n' ' ')
  read -r decode forward store <<<"$times"
  wall=$(echo "$end - $start" | bc)
  echo "| $name | $n | $(printf %.1f "$wall") | $(echo "scale=2; $n / $wall" | bc) | $decode | $forward | $store |"
done
