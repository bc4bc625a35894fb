#!/usr/bin/env bash
# Wall clock of the Dask driver with 1 worker and with 2 workers, side by side, on generated
# pictures: each run starts its own local cluster (scheduler + one-thread workers), learns
# the extractor, describes the parts on the workers and merges them (engine start-up and
# merge included). The two runs' part files must come out byte for byte the same.
#
#   tools/cluster/bench.sh [PICTURES (2000)] [PARTS (8)] [ENLARGE (10)]
#
# The demo archive's generator makes the pictures (about 150 x 100); enlarge.py makes them
# ENLARGE times wider and taller (1 keeps them), so describing dominates as with camera
# pictures. It needs Pillow: in python3 if there, else installed into the Dask venv.
#
# The driver's own steps (learning the extractor, merging) run with DRIVER_THREADS rayon
# threads (default 1; they run while the workers wait, on the driver's machine).
#
# Needs a Python with Dask distributed: TAGWEAVE_CLUSTER_PYTHON, else
# ${TMPDIR:-/tmp}/tagweave-ci-dask/bin/python (what .ci/run installs). Works in
# ${BENCH_DIR:-/tmp/tagweave-cluster-bench}.
set -euo pipefail
cd "$(dirname "$0")/../.."

pictures=${1:-2000}
parts=${2:-8}
enlarge=${3:-10}
python=${TAGWEAVE_CLUSTER_PYTHON:-${TMPDIR:-/tmp}/tagweave-ci-dask/bin/python}
bench=${BENCH_DIR:-/tmp/tagweave-cluster-bench}
driver=tools/cluster/tagweave_cluster.py

# The dev profile is optimised (opt-level 2, see Cargo.toml).
cargo build -q -p tagweave -p tagweave-demo-archive
tagweave=$PWD/target/debug/tagweave

mkdir -p "$bench"
small_dir="$bench/pictures-$pictures"
if [ ! -d "$small_dir" ]; then
  target/debug/tagweave-demo-archive "$small_dir" --count "$pictures" >/dev/null
fi
source_dir="$bench/pictures-$pictures-x$enlarge"
if [ "$enlarge" = 1 ]; then
  source_dir=$small_dir
elif [ ! -d "$source_dir" ]; then
  pillow=python3
  if ! python3 -c 'import PIL' 2>/dev/null; then
    "$python" -m pip install -q pillow
    pillow=$python
  fi
  "$pillow" tools/cluster/enlarge.py "$small_dir" "$source_dir.partial" --factor "$enlarge"
  mv "$source_dir.partial" "$source_dir"
fi

declare -A seconds
for workers in 1 2; do
  run="$bench/run-$workers"
  rm -rf "$run"
  mkdir -p "$run"
  cp -a "$source_dir" "$run/photos"  # -a: the same mtimes, so the same records
  rm -rf "$run/photos/.tagweave"
  started=$(date +%s.%N)
  RAYON_NUM_THREADS=${DRIVER_THREADS:-1} "$python" "$driver" "$run/photos" --work "$run/work" --parts "$parts" \
    --local-workers "$workers" --port $((8790 + workers)) --tagweave "$tagweave" \
    >"$run/driver.json" 2>"$run/driver.log"
  ended=$(date +%s.%N)
  seconds[$workers]=$(echo "$ended - $started" | bc)
done

for k in $(seq 1 "$parts"); do
  cmp -s "$bench/run-1/work/features-$k.parquet" "$bench/run-2/work/features-$k.parquet" ||
    { echo "part $k differs between the runs" >&2; exit 1; }
done

described=$("$python" -c 'import json,sys; print(sum(p["described"] for p in json.load(open(sys.argv[1]))["describe"]))' "$bench/run-1/driver.json")
echo "$described pictures (demo archive x$enlarge), $parts parts, one thread per worker, ${DRIVER_THREADS:-1} for the driver, commit $(git rev-parse --short HEAD), $(date -u +%Y-%m-%d)"
printf '%-10s %10s %12s\n' workers seconds pictures/s
for workers in 1 2; do
  printf '%-10s %10.1f %12.1f\n' "$workers" "${seconds[$workers]}" \
    "$(echo "$described / ${seconds[$workers]}" | bc -l)"
done
printf 'speed-up of 2 workers over 1: %.2fx (part files identical)\n' \
  "$(echo "${seconds[1]} / ${seconds[2]}" | bc -l)"
