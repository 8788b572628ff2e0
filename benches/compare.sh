#!/usr/bin/env bash
# Runs the Rust batch (`hypsogrid compute`, release build) and the NumPy baseline
# (benches/numpy_baseline.py) on the same synthetic 0.5° global cycle in one go, checks that
# their heights agree, and prints the timings and the ratios (see benches/README.md).
#
#   benches/compare.sh            # the 0.5° file, 3 paired runs
#   REPEAT=9 benches/compare.sh   # more pairs
#   QUARTER=1 benches/compare.sh  # also an invented 0.25° grid (721 x 1440 x 37, ~300 MB file)
#   ZLIB=1 benches/compare.sh     # also the same 0.5° cycle stored zlib-1 compressed (shuffled)
#   RH=1 benches/compare.sh       # also the same 0.5° cycle with relative humidity (as GFS files
#                                 # carry it) instead of specific humidity
#   SMOKE=1 benches/compare.sh    # one pair on an invented 5° grid (37 x 72 x 37, written by
#                                 # numpy_baseline.py) with the debug build, RH=1 included:
#                                 # checks the script and the agreement (CI runs it); its times
#                                 # mean nothing
#
# Whatever the mode, the script fails (exit 1) when the two sides' heights, below-ground
# flags or thicknesses disagree: a ratio between programs that compute different things is
# no ratio.
#
# The synthetic file is the one the compute bench writes (target/bench-data/global_0p5deg.nc);
# when it is missing, the compute bench's smoke run writes it. The Rust batch runs twice per
# repetition: with every core, and with one thread (RAYON_NUM_THREADS=1), since the NumPy
# baseline runs on one core; then the NumPy baseline once, and so on in turn. Peak resident
# memory comes from /usr/bin/time, wall times from bash's $EPOCHREALTIME.
set -euo pipefail
cd "$(dirname "$0")/.."

PY=${PYTHON:-target/python-venv/bin/python}
REPEAT=${REPEAT:-3}
INPUT=target/bench-data/global_0p5deg.nc
LABEL=0p5
BIN=target/release/hypsogrid
TIME=/usr/bin/time
if [ -n "${SMOKE:-}" ]; then
    REPEAT=1
    BIN=target/debug/hypsogrid
    ZLIB=0
    QUARTER=0
    RH=1
fi

if [ ! -x "$TIME" ]; then
    echo "compare.sh needs GNU time at $TIME (Debian package 'time')" >&2
    exit 1
fi
WORK=$(mktemp -d)
trap 'rm -rf "$WORK"' EXIT
if [ -n "${SMOKE:-}" ]; then
    cargo build --quiet --bin hypsogrid
    INPUT=$WORK/grid_5deg.nc
    LABEL=5deg
    "$PY" benches/numpy_baseline.py --grid 5 --repeat 1 --save-grid "$INPUT" >/dev/null
else
    cargo build --release --quiet
fi
if [ ! -f "$INPUT" ]; then
    echo "writing $INPUT with the compute bench's smoke run" >&2
    cargo bench --quiet --bench compute -- --test compute_parts_0p5deg/read >&2
fi

# Seconds between two $EPOCHREALTIME readings (GNU time's %e has only 10 ms steps, a tenth
# of a Rust run).
elapsed() {
    awk -v a="$1" -v b="$2" 'BEGIN { printf "%.4f", b - a }'
}

# One JSON line for one Rust run: wall seconds, user and system CPU seconds, peak RSS.
rust_run() {
    local label=$1 input=$2 threads=$3 i=$4 t0 t1
    rm -f "$WORK/rust_$label.nc"
    sync
    t0=$EPOCHREALTIME
    if [ "$threads" = all ]; then
        "$TIME" -o "$WORK/time.txt" -f '%e %U %S %M' \
            "$BIN" compute "$input" --output "$WORK/rust_$label.nc" >/dev/null
    else
        RAYON_NUM_THREADS=$threads "$TIME" -o "$WORK/time.txt" -f '%e %U %S %M' \
            "$BIN" compute "$input" --output "$WORK/rust_$label.nc" >/dev/null
    fi
    t1=$EPOCHREALTIME
    read -r _ user sys rss <"$WORK/time.txt"
    wall=$(elapsed "$t0" "$t1")
    printf '{"stage": "rust_whole_process", "grid": "%s", "threads": "%s", "repeat": %d, "seconds": %s, "user_s": %s, "sys_s": %s, "peak_rss_kb": %s}\n' \
        "$label" "$threads" "$i" "$wall" "$user" "$sys" "$rss"
}

# Each run writes a new file: the previous run's output is removed first, untimed, for both
# sides, and everything written so far is flushed (`sync`, untimed), so that no run shares
# the disk and the processor with the system writing back the file of the run before it
# (without it, whichever program ran right after the other's write was 5-10 % slower: the
# Rust run with every core, right after NumPy's, took 0.058 s against 0.052 s for the
# one-thread run after it, in (J)). Replacing a file that the previous run has just written makes the system free that
# file's pages first (the rename over it took 36 ms of a 0.12 s Rust run here, and NumPy's
# netCDF4 pays the same on creating over it), a cost of reruns into one path rather than of
# either program.
#
# The two sides take turns, one repetition each, so that both see the machine as it is in
# those seconds (on a shared machine the speed of either drifts by tens of per cent within
# a minute); the ratios are taken per repetition and their median reported. Each NumPy
# repetition is a whole Python process: its own read/compute/write timings, and the
# process's wall time from the interpreter's start.
run_grid() {
    local label=$1 input=$2
    for i in $(seq 0 $((REPEAT - 1))); do
        rust_run "$label" "$input" all "$i" | tee -a "$WORK/all.jsonl"
        rust_run "$label" "$input" 1 "$i" | tee -a "$WORK/all.jsonl"
        rm -f "$WORK/numpy_$label.nc"
        sync
        local t0=$EPOCHREALTIME t1
        "$TIME" -o "$WORK/time.txt" -f '%e %U %S %M' \
            "$PY" benches/numpy_baseline.py --input "$input" --output "$WORK/numpy_$label.nc" \
            --repeat 1 | sed "s/^{/{\"grid_label\": \"$label\", \"pair\": $i, /" |
            tee -a "$WORK/all.jsonl"
        t1=$EPOCHREALTIME
        read -r _ user sys rss <"$WORK/time.txt"
        wall=$(elapsed "$t0" "$t1")
        printf '{"stage": "numpy_process", "grid_label": "%s", "pair": %d, "seconds": %s, "peak_rss_kb": %s, "note": "whole Python process: start, imports, one repetition"}\n' \
            "$label" "$i" "$wall" "$rss" | tee -a "$WORK/all.jsonl"
    done
    # The heights of the two, compared once.
    "$PY" benches/numpy_baseline.py --input "$input" --output "$WORK/numpy_$label.nc" \
        --repeat 1 --check "$WORK/rust_$label.nc" | grep '"check"' |
        sed "s/^{/{\"grid_label\": \"$label\", /" | tee -a "$WORK/all.jsonl"
}

echo "# $(date -u +%Y-%m-%dT%H:%M:%SZ), load average: $(cut -d' ' -f1-3 /proc/loadavg), $(nproc) cores" >&2
run_grid "$LABEL" "$INPUT"
if [ "${ZLIB:-0}" = 1 ]; then
    ZLIB_INPUT=target/bench-data/global_0p5deg_zlib.nc
    if [ ! -f "$ZLIB_INPUT" ]; then
        echo "writing $ZLIB_INPUT with the compute bench's smoke run" >&2
        cargo bench --quiet --bench compute -- --test compute_whole_process_0p5deg/zlib1 >&2
    fi
    run_grid 0p5_zlib "$ZLIB_INPUT"
fi
if [ "${RH:-0}" = 1 ]; then
    RH_INPUT=${INPUT%.nc}_rh.nc
    if [ ! -f "$RH_INPUT" ]; then
        echo "writing $RH_INPUT from $INPUT (numpy_baseline.py --relative-humidity-copy)" >&2
        "$PY" benches/numpy_baseline.py --relative-humidity-copy "$INPUT" --output "$RH_INPUT" >/dev/null
    fi
    run_grid "${LABEL}_rh" "$RH_INPUT"
fi
if [ "${QUARTER:-0}" = 1 ]; then
    "$PY" benches/numpy_baseline.py --grid 0.25 --repeat "$REPEAT" --save-grid "$WORK/grid_0p25.nc" |
        sed 's/^{/{"grid_label": "0p25_in_memory", /' | tee -a "$WORK/all.jsonl"
    run_grid 0p25 "$WORK/grid_0p25.nc"
fi

"$PY" - "$WORK/all.jsonl" <<'EOF'
import json, statistics, sys

records = [json.loads(line) for line in open(sys.argv[1]) if line.startswith("{")]
# Both sides compute in f64 by the same method and store f32: their heights differ by the
# rounding of the last stored step at most (2-4 mm at 30-50 km), and by the order of the
# humidity conversion's operations with relative humidity (3.9 mm in docs/SPEED.md). A
# centimetre is far inside the metre a forecaster reads and far outside that rounding.
TOLERANCE_M = 0.01
disagreements = []


def compared(check):
    """The fields one comparison covered: the heights and each thickness, with their figures."""
    return {k: v for k, v in check.items() if isinstance(v, dict) and "compared" in v}


def agreement(label, check):
    """What makes the two sides' outputs of one grid differ, as lines (none when they agree)."""
    if not check:
        return [f"{label}: no comparison of the two outputs was recorded"]
    found = []
    fields = compared(check)
    for name, d in sorted(fields.items()):
        if not d["compared"]:
            found.append(f"{label}: {name}: no value compared")
        elif d["missing_in_one_only"]:
            found.append(f"{label}: {name}: {d['missing_in_one_only']} values missing on one side only")
        elif d["max_abs_m"] > TOLERANCE_M:
            found.append(f"{label}: {name}: max |d| {d['max_abs_m']} m > {TOLERANCE_M} m "
                         f"(worst at {d.get('worst_at')})")
    if "geopotential_height" not in fields:
        found.append(f"{label}: the heights were not compared")
    if check.get("layers_missing_in_other"):
        found.append(f"{label}: thickness of {', '.join(check['layers_missing_in_other'])} not in the Rust output")
    if check.get("below_ground_flags_differing"):
        found.append(f"{label}: {check['below_ground_flags_differing']} below-ground flags differ")
    return found


def median(values):
    return statistics.median(values) if values else float("nan")

for label in sorted({r.get("grid") or r.get("grid_label") for r in records if r.get("stage") == "rust_whole_process"}):
    def rust(threads):
        return {r["repeat"]: r for r in records if r.get("stage") == "rust_whole_process" and r["grid"] == label and r["threads"] == threads}
    def numpy(stage):
        return {r["pair"]: r["seconds"] for r in records if r.get("grid_label") == label and r.get("stage") == stage and "pair" in r}
    rust_all, rust_one = rust("all"), rust("1")
    np_stage = {s: numpy(s) for s in ("read", "compute", "write", "whole", "numpy_process")}
    pairs = sorted(set(rust_all) & set(rust_one) & set(np_stage["whole"]) & set(np_stage["numpy_process"]))
    rss = max([r["peak_rss_kb"] for r in list(rust_all.values()) + list(rust_one.values())] or [0])
    check = next((r for r in records if r.get("grid_label") == label and r.get("stage") == "check"), {})
    diff = check.get("geopotential_height", {})
    ratio = lambda num, den: median([num[i] / den[i]["seconds"] for i in pairs])
    print(f"grid {label}: {len(pairs)} paired repetitions, medians, seconds")
    print("  NumPy  read {:.3f}  compute {:.3f}  write {:.3f}  whole {:.3f}  whole Python process {:.3f}".format(
        *(median(list(np_stage[s].values())) for s in ("read", "compute", "write", "whole", "numpy_process"))))
    print(f"  Rust   whole process {median([r['seconds'] for r in rust_all.values()]):.3f} (all cores), "
          f"{median([r['seconds'] for r in rust_one.values()]):.3f} (one thread); peak RSS {rss / 1024:.0f} MiB")
    print(f"  ratio NumPy read+compute+write / Rust whole process, median of pairs: "
          f"{ratio(np_stage['whole'], rust_all):.1f} (all cores), {ratio(np_stage['whole'], rust_one):.1f} (one thread)")
    print(f"  ratio NumPy whole Python process / Rust whole process, median of pairs: "
          f"{ratio(np_stage['numpy_process'], rust_all):.1f} (all cores), {ratio(np_stage['numpy_process'], rust_one):.1f} (one thread)")
    # On shared machines one side's speed can move several times over from pair to pair
    # (NumPy's compute 0.21-1.21 s within one run in docs/SPEED.md (O)): the spread says how
    # far the medians can be trusted.
    spread = lambda values: f"{min(values):.3f}-{max(values):.3f}" if values else "none"
    pair_ratios = [np_stage["whole"][i] / rust_all[i]["seconds"] for i in pairs] or [0.0]
    print(f"  spread over the pairs: NumPy compute {spread(list(np_stage['compute'].values()))} s, "
          f"Rust whole process (all cores) {spread([rust_all[i]['seconds'] for i in pairs])} s, "
          f"ratio (read+compute+write, all cores) {min(pair_ratios):.1f}-{max(pair_ratios):.1f}")
    print(f"  heights NumPy - Rust: max |d| {diff.get('max_abs_m')} m, rms {diff.get('rms_m')} m over {diff.get('compared')} values")
    found = agreement(label, check)
    thick = len(set(compared(check)) - {"geopotential_height"})
    print(f"  agreement within {TOLERANCE_M} m (heights, {thick} thicknesses, below-ground flags): "
          + ("yes" if not found else "NO"))
    disagreements += found
if disagreements:
    sys.exit("compare.sh: the two sides disagree:\n  " + "\n  ".join(disagreements))
EOF
