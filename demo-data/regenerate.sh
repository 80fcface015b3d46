#!/usr/bin/env bash
# Regenerates demo-data/inbox/: the invented 18650-cell scenario described in
# demo-data/README.md, plus the deliberately bad files. Deterministic: running it
# again gives byte-identical files.
#
# Usage (from anywhere): bash demo-data/regenerate.sh
# Uses $LOTDRIFT_WORKLOAD if set, else target/release/lotdrift-workload (built if missing).
set -euo pipefail

here="$(cd "$(dirname "${BASH_SOURCE[0]}")" && pwd)"
repo="$(cd "$here/.." && pwd)"
inbox="$here/inbox"
workload="${LOTDRIFT_WORKLOAD:-$repo/target/release/lotdrift-workload}"
if [[ ! -x "$workload" ]]; then
    echo "building lotdrift-workload (release)..." >&2
    (cd "$repo" && cargo build --release --bin lotdrift-workload)
fi

# The scenario. LOTS is 40 for the demo inbox; the bad files are made from lot 41
# of the same scenario (same seed, so lots 1-40 are identical in both runs).
scenario_args() {
    local lots="$1"
    echo --source-names alder-cells,birchworks,cedar-energy \
        --characteristic-names capacity_mah=3000:15:1,internal_resistance_mohm=22.0:0.8:2,mass_g=46.5:0.2:2 \
        --lots "$lots" --units 32 --between-lot-sd 0.05 \
        --shift cedar-energy:capacity_mah:31:-1.5 \
        --shift cedar-energy:internal_resistance_mohm:31:1.0 \
        --lot-prefix alder-cells=AC-26- --lot-prefix birchworks=BW-26- --lot-prefix cedar-energy=CE-26- \
        --start-date 2026-01-05 --days-between-lots 4 --date-jitter-days 1 \
        --seed 2026
}

rm -rf "$inbox"
mkdir -p "$inbox"
# shellcheck disable=SC2046 # word splitting of the argument list is intended
"$workload" --out "$inbox" $(scenario_args 40) \
    --source-layout alder-cells=long --source-layout birchworks=wide --source-layout cedar-energy=mixed \
    --split birchworks:6+17+29:capacity_mah:cap \
    --comment-every 5

# Lot 41 of every supplier, all in long layout, as raw material for the bad files.
scratch="$(mktemp -d)"
trap 'rm -rf "$scratch"' EXIT
# shellcheck disable=SC2046
"$workload" --out "$scratch" $(scenario_args 41) --layout long >/dev/null

# 1. Decimal comma: the first capacity value becomes "2998,4" (quoted, so the CSV
#    itself still parses; the number does not).
{
    echo "# deliberately bad: a value written with a decimal comma"
    awk -F, -v OFS=, '!done && $2 == "capacity_mah" { $4 = "\"2998,4\""; done = 1 } { print }' \
        "$scratch/alder-cells_AC-26-041.csv"
} >"$inbox/alder-cells_AC-26-041_comma-decimal.csv"

# 2. Long layout without the required `lot` column.
{
    echo "# deliberately bad: the lot column is missing"
    awk -F, -v OFS=, '{ print $1, $2, $4, $5, $6 }' "$scratch/birchworks_BW-26-041.csv"
} >"$inbox/birchworks_BW-26-041_missing-column.csv"

# 3. A text value where a number belongs.
{
    echo "# deliberately bad: a measurement recorded as n/a"
    awk -F, -v OFS=, '$2 == "internal_resistance_mohm" && ++seen == 7 { $4 = "n/a" } { print }' \
        "$scratch/cedar-energy_CE-26-041.csv"
} >"$inbox/cedar-energy_CE-26-041_text-value.csv"

# 4. Re-send: an exact byte copy of a file that is already in the inbox.
cp "$inbox/alder-cells_AC-26-012.csv" "$inbox/alder-cells_AC-26-012_resend.csv"

# 5. Conflicting re-send: the same lot again with one capacity value changed
#    (unit BW-26-013-005 reads 12.5 mAh higher).
awk -F, -v OFS=, '$4 == "BW-26-013-005" { $5 = sprintf("%.1f", $5 + 12.5) } { print }' \
    "$inbox/birchworks_BW-26-013.csv" >"$inbox/birchworks_BW-26-013_corrected.csv"

count=$(find "$inbox" -name '*.csv' | wc -l)
size=$(du -sk --apparent-size "$inbox" | cut -f1)
echo "demo inbox: $count files, ${size} KiB in $inbox"
