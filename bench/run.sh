#!/usr/bin/env bash
# Side-by-side timing of `tilecut inspect` against the `onnx` Python package
# (onnx.load(..., load_external_data=False) + onnx.shape_inference.infer_shapes) and
# tract-onnx's load + type analysis, on generated models. Prints medians of N runs (whole
# processes, each timed from spawn to reap by bench/timeit.py; tilecut's two outputs and the
# Python pair take turns), peak RSS (one more run each, under /usr/bin/time), and ratios; the Python pair's time inside its process is the median of
# up to five runs, and tilecut's (`tc_in_ms`, milliseconds: read + import + inference +
# report, from the stage bench) is measured in turns with it, run by run, so that
# `inproc_rt` compares the two side by side; `whole_rt` sets the Python pair's in-process time
# against tilecut's whole process, the stricter reading of the in-process target.
# Usage: bash bench/run.sh [DIR] [RUNS]
set -euo pipefail
cd "$(dirname "$0")/.."
dir="${1:-bench-models}"
runs="${2:-5}"
cargo build --release --quiet
bin=target/release/tilecut
if [ ! -f "$dir/stack_100k.onnx" ]; then
  "$bin" dev bench-models "$dir"
fi
py_pair='import sys, onnx
from onnx import shape_inference
m = onnx.load(sys.argv[1], load_external_data=False)
shape_inference.infer_shapes(m)'
py_inproc='import sys, time, onnx
from onnx import shape_inference
t = time.perf_counter()
m = onnx.load(sys.argv[1], load_external_data=False)
shape_inference.infer_shapes(m)
print(time.perf_counter() - t)'

# One timed run of a command: appends its seconds to the file $1 (and, without Python, its
# max RSS in KB). With Python, the clock spans the process alone (bench/timeit.py: spawn to
# reap); without it, `date` around `/usr/bin/time`, whose own start and the `date` process
# add about 2 ms a run.
once() {
  local log=$1 tmp s e
  shift
  if [ -n "$have_py3" ]; then
    python3 bench/timeit.py "$log" "$@"
    return
  fi
  tmp=$(mktemp)
  s=$(date +%s%N)
  /usr/bin/time -o "$tmp" -f "%M" "$@" > /dev/null 2>&1 || true
  e=$(date +%s%N)
  echo "$(awk -v a="$s" -v b="$e" 'BEGIN { printf "%.4f", (b - a) / 1e9 }') $(tail -1 "$tmp")" >> "$log"
  rm -f "$tmp"
}

# Peak RSS (KB) of one untimed run of a command under `/usr/bin/time`: a process started from
# Python would report the Python parent's memory as its own (bench/timeit.py).
peak() {
  local tmp
  tmp=$(mktemp)
  /usr/bin/time -o "$tmp" -f "%M" "$@" > /dev/null 2>&1 || true
  tail -1 "$tmp"
  rm -f "$tmp"
}

# Median seconds of the runs logged in $1 and the peak RSS (KB) of the command that follows:
# from one more run under `/usr/bin/time`, or the logged runs' own without Python.
timed() {
  local log=$1 t r p
  shift
  read -r t r < <(summary "$log")
  p=$(peak "$@")
  [ "${p:-0}" -gt "$r" ] && r=$p
  echo "$t $r"
}

# Median seconds and peak RSS (KB) of a command over $runs runs.
measure() {
  local log
  log=$(mktemp)
  for _ in $(seq "$runs"); do once "$log" "$@"; done
  timed "$log" "$@"
  rm -f "$log"
}

# Median seconds and max RSS (KB) of the runs logged in the file $1.
summary() {
  sort -g "$1" | awk '{ t[NR] = $1; if ($2 > r) r = $2 } END { print t[int((NR + 1) / 2)], r + 0 }'
}

have_py3=$(command -v python3 > /dev/null && echo yes || true)
have_py=$(python3 -c 'import onnx' 2>/dev/null && echo yes || true)
printf '%-20s %10s %9s %9s %10s %9s %10s %8s %8s %10s %8s %8s\n' model tilecut_s json_s rss_MB onnx_py_s rss_MB in-proc_s ratio json_rt tc_in_ms inproc_rt whole_rt
for m in stack_10k stack_30k stack_100k stack_200k heavy_1g_inline heavy_1g_external heavy_2g_external; do
  f="$dir/$m.onnx"
  [ -f "$f" ] || continue
  # The default table output, the full JSON report (every tensor listed) and the Python
  # pair, round-robin: the machine's speed drifts within minutes, and three blocks of runs
  # one after the other each met a different stretch of it.
  lt=$(mktemp) lj=$(mktemp) lp=$(mktemp)
  for _ in $(seq "$runs"); do
    once "$lt" "$bin" inspect "$f"
    once "$lj" "$bin" inspect "$f" --format json
    if [ -n "$have_py" ]; then once "$lp" python3 -c "$py_pair" "$f"; fi
  done
  read -r ts tr < <(timed "$lt" "$bin" inspect "$f")
  read -r tj tjr < <(timed "$lj" "$bin" inspect "$f" --format json)
  [ "$tjr" -gt "$tr" ] && tr=$tjr
  if [ -n "$have_py" ]; then
    read -r ps pr < <(timed "$lp" python3 -c "$py_pair" "$f")
    # The in-process times, the Python pair's and tilecut's, taking turns run by run as the
    # whole processes do: timed one block after the other, a slow stretch of the machine
    # could meet one side only. Each is the median of up to five runs (one run swings by a
    # tenth). tilecut's is read + import + inference + report inside its process, the batch
    # symbolic as the Python pair reads it, a median of five rounds per process (the stage
    # bench's `--inproc`); the weight-heavy models, which the stage bench reads in about
    # 0.1 ms, only the plain row of its table.
    li=$(mktemp) lti=$(mktemp)
    for _ in $(seq "$(( runs < 5 ? runs : 5 ))"); do
      python3 -c "$py_inproc" "$f" >> "$li" 2>/dev/null || echo nan >> "$li"
      if [[ $m == stack_* ]]; then
        cargo bench --quiet --bench stages -- "$dir" "$m" --inproc >> "$lti" 2>/dev/null || true
      fi
    done
    ip=$(sort -g "$li" | awk '{a[NR]=$1} END {print a[int((NR+1)/2)]}')
    if [[ $m == stack_* ]]; then
      tip=$(sort -g "$lti" | awk '{a[NR]=$1} END {if (NR) printf "%.1f", a[int((NR+1)/2)]}')
    else
      stages=$(cargo bench --quiet --bench stages -- "$dir" "$m" 2>/dev/null || true)
      tip=$(awk -v m="$m" '$1 == m { printf "%.1f", $2 + $4 + $5 + $6 }' <<< "$stages")
    fi
    rm -f "$li" "$lti"
    tip=${tip:-n/a}
    # Below 1 ms the stage bench's 0.1 ms rounding is a tenth or more of the figure: no ratio.
    iratio=$(awk -v a="$ip" -v b="$tip" 'BEGIN { if (b + 0 >= 1 && a + 0 > 0) printf "%.1fx", a * 1000 / b; else print "n/a" }')
    ratio=$(awk -v a="$ps" -v b="$ts" 'BEGIN { if (b > 0) printf "%.1fx", a / b; else print "inf" }')
    jratio=$(awk -v a="$ps" -v b="$tj" 'BEGIN { if (b > 0) printf "%.1fx", a / b; else print "inf" }')
    # The stricter reading of the in-process target: the Python pair's time inside its
    # process against tilecut's whole process (table output), start-up and exit included.
    wratio=$(awk -v a="$ip" -v b="$ts" 'BEGIN { if (b > 0 && a + 0 > 0) printf "%.1fx", a / b; else print "n/a" }')
  else
    ps=nan; pr=0; ip=nan; tip=nan; ratio=n/a; jratio=n/a; iratio=n/a; wratio=n/a
  fi
  printf '%-20s %10s %9s %9d %10s %9d %10.3f %8s %8s %10s %8s %8s\n' "$m" "$ts" "$tj" $((tr / 1024)) "$ps" $((pr / 1024)) "$ip" "$ratio" "$jratio" "$tip" "$iratio" "$wratio"
  rm -f "$lt" "$lj" "$lp"
done
echo
echo "analyze end to end (read, judge, cut, map, report), whole process, table output:"
for m in stack_10k stack_50k stack_100k stack_200k; do
  f="$dir/$m.onnx"
  [ -f "$f" ] || continue
  read -r at ar < <(measure "$bin" analyze "$f" --target wide-array --dim batch=1)
  printf '%-20s %8s s %6d MB\n' "$m" "$at" $((ar / 1024))
done
echo
echo "split of the model with 2.25 GiB of external data (weights copied range by range, never held in memory):"
if [ -f "$dir/heavy_2g_external.onnx" ]; then
  out="$dir/heavy_2g_split"
  /usr/bin/time -o "$dir/split.time" -f "%e %M" "$bin" split "$dir/heavy_2g_external.onnx" \
    --target wide-array --strategy greedy --out "$out" --force > /dev/null
  read -r st sr < "$dir/split.time"
  size=$(du -sb "$out" | cut -f1)
  printf 'split: %s s, peak RSS %d MB, %s bytes written into %s\n' "$st" $((sr / 1024)) "$size" "$out"
  ls -l "$out"
  rm -rf "$out"
fi
echo
echo "per-stage medians inside tilecut (cargo bench --bench stages):"
cargo bench --quiet --bench stages -- "$dir" 2>/dev/null | tail -n +1
