#!/usr/bin/env bash
# One candidate, one seed, the protocol of README "Choosing the demo's defaults (measured)":
#   train (5 members) -> export 30 draws -> calibrate on SCORE at 0.98 / 0.9 / 0.3 on the cal split
#   -> demur evaluate --holdout-class 9 [--baseline]
# Usage: deploy/measure-posteriors.sh OUTDIR SEED SCORE [--baseline] -- [demur train options]
# Writes OUTDIR/s{SEED}/{checkpoint,bundle,evaluation,time.txt}. Run with `nice -n 10`.
# The table: python deploy/posterior_table.py OUTDIR... (README, "Meeting issue 26's targets").
set -euo pipefail
OUT=$1; SEED=$2; SCORE=$3; shift 3
BASE=()
if [ "${1:-}" = "--baseline" ]; then BASE=(--baseline); shift; fi
[ "${1:-}" = "--" ] && shift
D="$OUT/s$SEED"; rm -rf "$D"; mkdir -p "$D"
# training time: CPU seconds (user + sys) of `demur train` alone, one thread
/usr/bin/time -f "%U %S %e" -o "$D/time.txt" \
  demur train --data digits --members 5 --seed "$SEED" --threads 1 --no-progress --out "$D/checkpoint" "$@" > "$D/train.log" 2>&1
demur export "$D/checkpoint" --draws 30 --out "$D/bundle" > "$D/export.log" 2>&1
demur calibrate "$D/bundle" --data digits --seed "$SEED" --target-accuracy 0.98 --confidence 0.9 --max-abstain 0.3 \
  --score "$SCORE" > "$D/calibrate.log" 2>&1
demur evaluate "$D/bundle" --data digits --holdout-class 9 "${BASE[@]}" --out "$D/evaluation" > "$D/evaluate.log" 2>&1
echo "$OUT seed $SEED done"
