#!/usr/bin/env bash
# Times the row kernel (criterion: `kernel_0p25deg/heights_all_levels`, heights on 37 levels
# of an invented 0.25° grid in memory) and the NumPy baseline's compute step on an invented
# grid of the same shape (`numpy_baseline.py --grid 0.25 --layers ''`: heights only, as the
# kernel bench) in turn, and prints the kernel's ratio against NumPy's median and fastest
# warm runs (see benches/README.md).
#
#   benches/kernel_ratio.sh             # 2 rounds, 5 NumPy runs a round
#   ROUNDS=4 benches/kernel_ratio.sh    # more rounds
#   SMOKE=1 benches/kernel_ratio.sh     # one short round, to check the script itself
#
# A round is one NumPy process (its first compute step touches fresh memory and is left
# out as cold; the rest are its warm runs) and then one criterion run of the kernel. NumPy
# needs about 3 GB of memory at 0.25°.
set -euo pipefail
cd "$(dirname "$0")/.."

PY=${PYTHON:-target/python-venv/bin/python}
ROUNDS=${ROUNDS:-2}
REPEAT=${REPEAT:-5}
BENCH=('kernel_0p25deg/heights_all_levels$' --noplot)
if [ -n "${SMOKE:-}" ]; then
    ROUNDS=1
    REPEAT=2
    BENCH+=(--warm-up-time 0.5 --measurement-time 1)
fi

WORK=$(mktemp -d)
trap 'rm -rf "$WORK"' EXIT
echo "# $(date -u +%Y-%m-%dT%H:%M:%SZ), load average: $(cut -d' ' -f1-3 /proc/loadavg), $(nproc) cores"
cargo bench --quiet --bench kernel --no-run
for round in $(seq "$ROUNDS"); do
    "$PY" benches/numpy_baseline.py --grid 0.25 --layers '' --repeat "$REPEAT" |
        grep '"stage": "compute"' | sed "s/^/{\"round\": $round, \"numpy\": /; s/\$/}/" >>"$WORK/numpy.jsonl"
    # Criterion's line `time: [low estimate high]`, the estimate in ms or s.
    cargo bench --quiet --bench kernel -- "${BENCH[@]}" >"$WORK/bench.txt" 2>"$WORK/bench.err"
    if ! grep -m1 'time:' "$WORK/bench.txt" | sed "s/^/$round /" >>"$WORK/kernel.txt"; then
        echo "kernel_ratio.sh: the kernel bench printed no time; it said:" >&2
        cat "$WORK/bench.txt" "$WORK/bench.err" >&2
        exit 1
    fi
done

"$PY" - "$WORK" <<'EOF'
import json, statistics, sys, re
work = sys.argv[1]
numpy = {}
for line in open(f"{work}/numpy.jsonl"):
    row = json.loads(line)
    # The first compute step of each process is cold: left out.
    if row["numpy"]["repeat"] > 0:
        numpy.setdefault(row["round"], []).append(row["numpy"]["seconds"])
kernel = {}
unit = {"ns": 1e-9, "µs": 1e-6, "us": 1e-6, "ms": 1e-3, "s": 1.0}
for line in open(f"{work}/kernel.txt"):
    round_, rest = line.split(" ", 1)
    values = re.findall(r"([0-9.]+) (ns|µs|us|ms|s)\b", rest)
    if len(values) != 3:
        sys.exit(f"kernel_ratio.sh: no criterion estimate in {rest!r}")
    kernel[int(round_)] = float(values[1][0]) * unit[values[1][1]]
if not numpy or not kernel:
    sys.exit("kernel_ratio.sh: no NumPy warm run or no kernel time was recorded")
print(f"kernel 0.25° (721 x 1440 x 37): {len(kernel)} round(s) in turn")
for r in sorted(kernel):
    runs = " ".join(f"{s:.3f}" for s in numpy.get(r, []))
    print(f"  round {r}: NumPy warm runs {runs} s; kernel {kernel[r] * 1e3:.1f} ms")
warm = [s for r in numpy.values() for s in r]
k = statistics.median(kernel.values())
print(f"  NumPy compute, warm runs: median {statistics.median(warm):.3f} s, "
      f"fastest {min(warm):.3f} s (n {len(warm)})")
print(f"  kernel: median {k * 1e3:.1f} ms (n {len(kernel)})")
print(f"  ratio: {statistics.median(warm) / k:.1f}x against NumPy's median warm run, "
      f"{min(warm) / k:.1f}x against its fastest")
EOF
