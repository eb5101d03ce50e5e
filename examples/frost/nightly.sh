#!/usr/bin/env bash
# Nightly retune of the frost demo: regenerate tonight's station data (with a
# little seasonal drift), retune against the config in use, keep a history.
#
# crontab line (02:30 every night; the log keeps the scheduler's view):
#   30 2 * * * cd /path/to/bittune && examples/frost/nightly.sh >> runs/nightly/cron.log 2>&1
#
# Exit codes (see README): 0 replaced, 5 kept, 4 nothing reaches the target,
# 2 bad input, 3 gradient check failed, 6 storage unreachable.
set -u
cd "$(dirname "$0")/../.."
BITTUNE=${BITTUNE:-.venv/bin/bittune}
PY=${PY:-.venv/bin/python}
OUT=runs/nightly
NIGHT=${NIGHT:-$(date -u +%j)}          # day of the year: a new sample every night
DRIFT=${DRIFT:-0.3}                      # degrees warmer per night of the run
mkdir -p "$OUT"

# Tonight's data: a fresh sample, a little warmer each night.
"$PY" examples/frost/make_data.py --out "$OUT/stations.svm" --seed "$((7 + 10#$NIGHT))" \
    --drift "$(awk -v n="$((10#$NIGHT))" -v d="$DRIFT" 'BEGIN { print (n % 10) * d }')"
sed "s#^data: .*#data: stations.svm#" examples/frost/job.yaml > "$OUT/job.yaml"

# First night: no config in use yet, so tune one.
if [ ! -f "$OUT/config.yaml" ]; then
    "$BITTUNE" tune "$OUT/job.yaml" -o "$OUT/config.yaml" --trials "${TRIALS:-40}"
    exit $?
fi

"$BITTUNE" retune "$OUT/job.yaml" --previous "$OUT/config.yaml" -o "$OUT/config.yaml" \
    --run-dir "$OUT/run-$NIGHT" --history "$OUT/history" --trials "${RETUNE_TRIALS:-15}"
code=$?
case $code in
    0) echo "night $NIGHT: new config written" ;;
    5) echo "night $NIGHT: previous config kept" ;;
    *) echo "night $NIGHT: retune failed with exit $code" ;;
esac
"$BITTUNE" history "$OUT/history"
exit $code
