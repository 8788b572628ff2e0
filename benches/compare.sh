#!/usr/bin/env bash
# Runs the Rust batch (`hypsogrid compute`, release build) and the NumPy baseline
# (benches/numpy_baseline.py) on the same synthetic 0.5° global cycle in one go, checks that
# their heights agree, and prints the timings and the ratios (see benches/README.md).
#
#   benches/compare.sh            # the 0.5° file, 3 runs of each
#   REPEAT=5 benches/compare.sh   # more runs
#   QUARTER=1 benches/compare.sh  # also an invented 0.25° grid (721 x 1440 x 37, ~300 MB file)
#
# The synthetic file is the one the compute bench writes (target/bench-data/global_0p5deg.nc);
# when it is missing, the compute bench's smoke run writes it. The Rust batch runs twice per
# repetition: with every core, and with one thread (RAYON_NUM_THREADS=1), since the NumPy
# baseline runs on one core. Peak resident memory comes from /usr/bin/time.
set -euo pipefail
cd "$(dirname "$0")/.."

PY=${PYTHON:-target/python-venv/bin/python}
REPEAT=${REPEAT:-3}
INPUT=target/bench-data/global_0p5deg.nc
TIME=/usr/bin/time

if [ ! -x "$TIME" ]; then
    echo "compare.sh needs GNU time at $TIME (Debian package 'time')" >&2
    exit 1
fi
cargo build --release --quiet
if [ ! -f "$INPUT" ]; then
    echo "writing $INPUT with the compute bench's smoke run" >&2
    cargo bench --quiet --bench compute -- --test compute_parts_0p5deg/read >&2
fi

WORK=$(mktemp -d)
trap 'rm -rf "$WORK"' EXIT

# One JSON line per Rust run: wall seconds, user and system CPU seconds, peak RSS.
rust_runs() {
    local label=$1 input=$2 threads=$3
    for i in $(seq "$REPEAT"); do
        if [ "$threads" = all ]; then
            "$TIME" -o "$WORK/time.txt" -f '%e %U %S %M' \
                target/release/hypsogrid compute "$input" --output "$WORK/rust_$label.nc" >/dev/null
        else
            RAYON_NUM_THREADS=$threads "$TIME" -o "$WORK/time.txt" -f '%e %U %S %M' \
                target/release/hypsogrid compute "$input" --output "$WORK/rust_$label.nc" >/dev/null
        fi
        read -r wall user sys rss <"$WORK/time.txt"
        printf '{"stage": "rust_whole_process", "grid": "%s", "threads": "%s", "repeat": %d, "seconds": %s, "user_s": %s, "sys_s": %s, "peak_rss_kb": %s}\n' \
            "$label" "$threads" "$((i - 1))" "$wall" "$user" "$sys" "$rss"
    done
}

run_grid() {
    local label=$1 input=$2
    rust_runs "$label" "$input" all | tee -a "$WORK/all.jsonl"
    rust_runs "$label" "$input" 1 | tee -a "$WORK/all.jsonl"
    "$TIME" -o "$WORK/time.txt" -f '%e %U %S %M' \
        "$PY" benches/numpy_baseline.py --input "$input" --output "$WORK/numpy_$label.nc" \
        --repeat "$REPEAT" --check "$WORK/rust_$label.nc" | sed "s/^{/{\"grid_label\": \"$label\", /" |
        tee -a "$WORK/all.jsonl"
    read -r wall user sys rss <"$WORK/time.txt"
    printf '{"stage": "numpy_process", "grid_label": "%s", "seconds": %s, "peak_rss_kb": %s, "note": "whole Python process, all %s repetitions and the check"}\n' \
        "$label" "$wall" "$rss" "$REPEAT" | tee -a "$WORK/all.jsonl"
}

echo "# $(date -u +%Y-%m-%dT%H:%M:%SZ), load average: $(cut -d' ' -f1-3 /proc/loadavg), $(nproc) cores" >&2
run_grid 0p5 "$INPUT"
if [ "${QUARTER:-0}" = 1 ]; then
    "$PY" benches/numpy_baseline.py --grid 0.25 --repeat "$REPEAT" --save-grid "$WORK/grid_0p25.nc" |
        sed 's/^{/{"grid_label": "0p25_in_memory", /' | tee -a "$WORK/all.jsonl"
    run_grid 0p25 "$WORK/grid_0p25.nc"
fi

"$PY" - "$WORK/all.jsonl" <<'EOF'
import json, statistics, sys

records = [json.loads(line) for line in open(sys.argv[1]) if line.startswith("{")]

def median(values):
    return statistics.median(values) if values else float("nan")

for label in sorted({r.get("grid") or r.get("grid_label") for r in records if r.get("stage") == "rust_whole_process"}):
    rust_all = median([r["seconds"] for r in records if r.get("stage") == "rust_whole_process" and r["grid"] == label and r["threads"] == "all"])
    rust_one = median([r["seconds"] for r in records if r.get("stage") == "rust_whole_process" and r["grid"] == label and r["threads"] == "1"])
    rss = max([r["peak_rss_kb"] for r in records if r.get("stage") == "rust_whole_process" and r["grid"] == label] or [0])
    np_stage = {s: median([r["seconds"] for r in records if r.get("grid_label") == label and r.get("stage") == s])
                for s in ("read", "compute", "write", "whole")}
    check = next((r for r in records if r.get("grid_label") == label and r.get("stage") == "check"), {})
    diff = check.get("geopotential_height", {})
    print(f"grid {label}: medians of the repetitions, seconds")
    print(f"  NumPy  read {np_stage['read']:.3f}  compute {np_stage['compute']:.3f}  write {np_stage['write']:.3f}  whole {np_stage['whole']:.3f}")
    print(f"  Rust   whole process {rust_all:.3f} (all cores), {rust_one:.3f} (one thread); peak RSS {rss / 1024:.0f} MiB")
    print(f"  ratio NumPy whole / Rust whole process: {np_stage['whole'] / rust_all:.1f} (all cores), {np_stage['whole'] / rust_one:.1f} (one thread)")
    print(f"  heights NumPy - Rust: max |d| {diff.get('max_abs_m')} m, rms {diff.get('rms_m')} m over {diff.get('compared')} values")
EOF
