#!/usr/bin/env bash
# GPU check: the default 2D recipe and the digits recipe on cuda with bf16 autocast, against the same
# recipe on CPU, reporting teacher/student iterations per second and their ratio. Fits in < 5 minutes
# on one modern GPU. Needs torch with CUDA on the GPU machine. Usage: bash benchmarks/gpu_check.sh [OUT]
set -euo pipefail
out=${1:-${OUT:-/tmp/distillrun-gpu-check}}
mkdir -p "$out"
export MLFLOW_DISABLE_TELEMETRY=true
short="teacher.iterations=1000 method.iterations=300 tracking=off quiet=true fresh=true"
for recipe in archipelago_progressive digits_progressive; do
  for dev in cpu gpu; do
    extra=""; [ "$dev" = cpu ] && extra="compute.threads=4"
    start=$(date +%s)
    distillrun recipe=$recipe compute=$dev $extra $short run_dir="$out/$recipe-$dev" > "$out/$recipe-$dev.log" 2>&1
    echo "$recipe $dev wall_s=$(( $(date +%s) - start ))"
  done
done
python - "$out" <<'PY'
import json, sys
from pathlib import Path
out = Path(sys.argv[1])
print(f"{'recipe':<26}{'teacher it/s cpu':>17}{'gpu':>9}{'ratio':>7}{'stage it/s cpu':>16}{'gpu':>9}{'ratio':>7}")
for recipe in ("archipelago_progressive", "digits_progressive"):
    row = {}
    for dev in ("cpu", "gpu"):
        d = out / f"{recipe}-{dev}"
        row[dev] = (json.loads((d / "teacher" / "model.json").read_text())["its_per_s"],
                    json.loads((d / "stage-01" / "metrics.json").read_text())["its_per_s"])
    (tc, sc), (tg, sg) = row["cpu"], row["gpu"]
    print(f"{recipe:<26}{tc:>17.1f}{tg:>9.1f}{tg / tc:>7.1f}{sc:>16.1f}{sg:>9.1f}{sg / sc:>7.1f}")
PY
