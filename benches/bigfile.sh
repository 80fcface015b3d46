#!/usr/bin/env bash
# One large file: peak memory and wall time of `lotdrift run --once` on a single export of a
# whole year (the long layout with sampled_at and unit, 3 M values, about 190 MB), against
# the file's own size.
#
#   1. finds the binaries (benches/common.sh): LOTDRIFT_BIN / LOTDRIFT_BIN_B / WORKLOAD_BIN,
#   2. generates SOURCES x CHARACTERISTICS x LOTS x UNITS values with lotdrift-workload and
#      joins them into one file (one header),
#   3. REPEAT rounds, each running binary A then B (when given) on a fresh `lotdrift init`
#      folder with the file in the inbox, timed under /usr/bin/time (peak RSS, wall),
#   4. prints each run, the medians, and the peak RSS as a multiple of the file size.
#
# The engine pass after the file is stored is part of the run (its memory is small).
#
# Knobs (environment): LOTDRIFT_BIN, LOTDRIFT_BIN_B, WORKLOAD_BIN;
#   SOURCES=10 CHARACTERISTICS=3 LOTS=1000 UNITS=100 SEED=3 LAYOUT=long REPEAT=3 KEEP=1
set -euo pipefail
bench_name=bigfile
source "$(dirname "${BASH_SOURCE[0]}")/common.sh"

SOURCES="${SOURCES:-10}" CHARACTERISTICS="${CHARACTERISTICS:-3}" LOTS="${LOTS:-1000}"
UNITS="${UNITS:-100}" SEED="${SEED:-3}" LAYOUT="${LAYOUT:-long}" REPEAT="${REPEAT:-3}"
for v in SOURCES CHARACTERISTICS LOTS UNITS SEED REPEAT; do positive_int "$v"; done
[[ "$LAYOUT" == long || "$LAYOUT" == wide ]] || die "LAYOUT must be long or wide"
[[ -x /usr/bin/time ]] || die "needs GNU time at /usr/bin/time (Debian package 'time')"
resolve_binaries

work="$(mktemp -d)"
[[ -n "${KEEP:-}" ]] || trap 'rm -rf "$work"' EXIT
say "generating ${SOURCES}x${CHARACTERISTICS}x${LOTS}x${UNITS} values ($LAYOUT) in $work"
"$WORKLOAD" --out "$work/parts" --sources "$SOURCES" --characteristics "$CHARACTERISTICS" \
    --lots "$LOTS" --units "$UNITS" --seed "$SEED" --layout "$LAYOUT" >/dev/null
first="$(find "$work/parts" -name '*.csv' -print -quit)"
{
    head -1 "$first"
    find "$work/parts" -name '*.csv' | sort | while read -r f; do tail -n +2 "$f"; done
} >"$work/year.csv"
rm -rf "$work/parts"
size=$(stat -c %s "$work/year.csv")
say "one file of $((size / 1000000)) MB, $(($(wc -l <"$work/year.csv") - 1)) rows"
machine_note >&2

declare -A rss wall
for round in $(seq "$REPEAT"); do
    for label in "${LABELS[@]}"; do
        dir="$work/run-$label-$round"
        "$(bin_of "$label")" init "$dir" >/dev/null
        quiet_silence "$dir/lotdrift.toml"
        cp "$work/year.csv" "$dir/inbox/"
        touch -d '-1 hour' "$dir/inbox/year.csv"
        /usr/bin/time -f '%M %e' -o "$dir/time" \
            "$(bin_of "$label")" run --once --config "$dir/lotdrift.toml" >"$dir/log" 2>&1 \
            || die "run $label $round failed; see $dir/log"
        read -r kib secs <"$dir/time"
        grep -q 'stored=1' "$dir/log" || die "run $label $round did not store the file; see $dir/log"
        printf '%s round %s: peak RSS %s MiB, wall %s s\n' "$label" "$round" "$((kib / 1024))" "$secs"
        rss[$label]+="$kib "
        wall[$label]+="$secs "
        rm -rf "$dir"
    done
done
for label in "${LABELS[@]}"; do
    m_rss=$(tr ' ' '\n' <<<"${rss[$label]}" | grep . | median)
    m_wall=$(tr ' ' '\n' <<<"${wall[$label]}" | grep . | median)
    printf '%s median: peak RSS %s MiB (%s x the file), wall %s s\n' "$label" \
        "$(awk -v k="$m_rss" 'BEGIN { printf "%.0f", k / 1024 }')" \
        "$(ratio "$(awk -v k="$m_rss" 'BEGIN { print k * 1024 }')" "$size")" "$m_wall"
    eval "med_rss_$label=$m_rss med_wall_$label=$m_wall"
done
if [[ -n "$BIN_B" ]]; then
    printf 'B / A: peak RSS %s, wall %s\n' "$(ratio "$med_rss_B" "$med_rss_A")" "$(ratio "$med_wall_B" "$med_wall_A")"
fi
