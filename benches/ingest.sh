#!/usr/bin/env bash
# Ingest benchmark: lotdrift against the "floor" (benches/ingest_floor.rs).
#
#   1. builds everything in release once (cargo build --release --bins --benches),
#   2. generates a workload with lotdrift-workload into a temp dir,
#   3. runs the floor (cargo bench --bench ingest_floor) REPEAT times on it,
#   4. REPEAT times: fresh dir, `lotdrift init DIR`, copies the workload into
#      DIR/inbox and times `lotdrift run --config DIR/lotdrift.toml --once` under
#      /usr/bin/time -v (wall time, peak RSS),
#   5. prints each run, the medians and the ratio lotdrift / floor.
#
# Knobs (environment):
#   SOURCES=200 CHARACTERISTICS=3 LOTS=200 UNITS=32   workload size (default 3.84 M values)
#   LAYOUT=mixed           long | wide | mixed
#   SEED=1                 generator seed
#   REPEAT=3               runs of the floor and of lotdrift
#   FLOOR_BATCH=1          rows per INSERT execution in the floor (1 = one per value)
#   WORKLOAD_DIR=path      use this existing folder of lot files instead of generating one
#   SKIP_FLOOR=1           do not run the floor (no ratio is printed)
#   SKIP_LOTDRIFT=1        only build, generate and run the floor
#   KEEP=1                 keep the temp dir (workload, run dirs, logs) for inspection
#   BENCH_TMP=/path        parent of the temp dir (default: $TMPDIR or /tmp)
#
# Example (small): SOURCES=20 LOTS=50 REPEAT=3 bash benches/ingest.sh
set -euo pipefail

SOURCES="${SOURCES:-200}"
CHARACTERISTICS="${CHARACTERISTICS:-3}"
LOTS="${LOTS:-200}"
UNITS="${UNITS:-32}"
LAYOUT="${LAYOUT:-mixed}"
SEED="${SEED:-1}"
REPEAT="${REPEAT:-3}"
FLOOR_BATCH="${FLOOR_BATCH:-1}"
SKIP_FLOOR="${SKIP_FLOOR:-0}"
SKIP_LOTDRIFT="${SKIP_LOTDRIFT:-0}"
KEEP="${KEEP:-0}"

say() { printf '[ingest.sh] %s\n' "$*" >&2; }
die() { say "error: $*"; exit 1; }

[[ "$REPEAT" =~ ^[1-9][0-9]*$ ]] || die "REPEAT must be a positive integer (got '$REPEAT')"
for v in SOURCES CHARACTERISTICS LOTS UNITS; do
    [[ "${!v}" =~ ^[1-9][0-9]*$ ]] || die "$v must be a positive integer (got '${!v}')"
done

repo="$(cd "$(dirname "${BASH_SOURCE[0]}")/.." && pwd)"
cd "$repo"
target_dir="${CARGO_TARGET_DIR:-$repo/target}"
bin_dir="$target_dir/release"

# --- GNU time ---------------------------------------------------------------
if [[ "$SKIP_LOTDRIFT" != 1 ]] && ! /usr/bin/time -v true >/dev/null 2>&1; then
    say "/usr/bin/time (GNU time) is missing; installing the Debian package 'time' with apt-get"
    if [[ "$(id -u)" -eq 0 ]]; then
        apt-get update -qq && apt-get install -y -qq time >/dev/null
    elif command -v sudo >/dev/null; then
        sudo apt-get update -qq && sudo apt-get install -y -qq time >/dev/null
    else
        die "cannot install 'time' (not root, no sudo); install it and re-run"
    fi
    /usr/bin/time -v true >/dev/null 2>&1 || die "/usr/bin/time -v still does not work"
fi

# --- build once -------------------------------------------------------------
say "building release binaries and benches (cargo build --release --bins --benches)"
cargo build --release --bins --benches
[[ -x "$bin_dir/lotdrift-workload" ]] || die "missing $bin_dir/lotdrift-workload after the build"
if [[ "$SKIP_LOTDRIFT" != 1 ]]; then
    [[ -x "$bin_dir/lotdrift" ]] || die "missing $bin_dir/lotdrift after the build"
fi

work="$(mktemp -d "${BENCH_TMP:-${TMPDIR:-/tmp}}/lotdrift-ingest-bench.XXXXXX")"
cleanup() {
    if [[ "$KEEP" == 1 ]]; then
        say "kept $work"
    else
        rm -rf "$work"
    fi
}
trap cleanup EXIT
say "scratch dir: $work"

# --- workload ---------------------------------------------------------------
if [[ -n "${WORKLOAD_DIR:-}" ]]; then
    [[ -d "$WORKLOAD_DIR" ]] || die "WORKLOAD_DIR=$WORKLOAD_DIR is not a directory"
    workload="$(cd "$WORKLOAD_DIR" && pwd)"
    files=$(find "$workload" -maxdepth 1 -name '*.csv' | wc -l)
    # Count values: long files have one per data row, wide files one per cell beyond
    # the four id columns. Comment lines and headers do not count.
    values=$(find "$workload" -maxdepth 1 -name '*.csv' -exec awk -F, '
        FNR == 1 { header = 1; long = 0 }
        /^#/ { next }
        header { header = 0; long = ($0 ~ /(^|,)characteristic(,|$)/); width = NF; next }
        { n += long ? 1 : width - 4 }
        END { print n + 0 }' {} + | awk '{ s += $1 } END { print s + 0 }')
    say "using existing workload $workload: $files files, $values values"
else
    workload="$work/workload"
    say "generating workload: $SOURCES sources x $CHARACTERISTICS characteristics x $LOTS lots x $UNITS units ($LAYOUT layout)"
    # A between-lot component and a late shift for every tenth source, so the
    # drift checks have something to find; shuffled names exercise ordering.
    shift_from=$(( LOTS * 3 / 4 > 0 ? LOTS * 3 / 4 : 1 ))
    shift_args=()
    for (( s = 1; s <= SOURCES; s += 10 )); do
        shift_args+=(--shift "$(printf 'source-%03d' "$s"):*:$shift_from:1.0")
    done
    gen_out="$("$bin_dir/lotdrift-workload" --out "$workload" \
        --sources "$SOURCES" --characteristics "$CHARACTERISTICS" \
        --lots "$LOTS" --units "$UNITS" --between-lot-sd 0.1 \
        --layout "$LAYOUT" --seed "$SEED" --shuffle-names --comment-every 10 \
        "${shift_args[@]}")"
    echo "$gen_out"
    files=$(sed -n 's/.* files=\([0-9]*\).*/\1/p' <<<"$gen_out")
    values=$(sed -n 's/.* values=\([0-9]*\).*/\1/p' <<<"$gen_out")
    [[ -n "$files" && -n "$values" ]] || die "could not read the generator's summary line"
fi
workload_mib=$(du -sm --apparent-size "$workload" | cut -f1)
say "workload: $files files, $values values, ${workload_mib} MiB"

median() { sort -g | awk '{ v[NR] = $1 } END { if (NR == 0) exit 1; if (NR % 2) print v[(NR + 1) / 2]; else printf "%.3f\n", (v[NR / 2] + v[NR / 2 + 1]) / 2 }'; }

# --- floor ------------------------------------------------------------------
floor_median=""
if [[ "$SKIP_FLOOR" != 1 ]]; then
    say "running the floor $REPEAT time(s): cargo bench --bench ingest_floor (batch=$FLOOR_BATCH)"
    floor_log="$work/floor.log"
    LOTDRIFT_BENCH_DIR="$workload" LOTDRIFT_BENCH_REPEAT="$REPEAT" \
        LOTDRIFT_BENCH_BATCH="$FLOOR_BATCH" LOTDRIFT_BENCH_DB_DIR="$work" \
        cargo bench --bench ingest_floor 2>&1 | tee "$floor_log" | grep '^ingest_floor:' \
        || die "the floor failed; see output above or $floor_log (KEEP=1 keeps it)"
    floor_median=$(sed -n 's/^ingest_floor: median wall_s=\([0-9.]*\).*/\1/p' "$floor_log")
    [[ -n "$floor_median" ]] || die "no median line in the floor's output ($floor_log)"
fi

# --- lotdrift ---------------------------------------------------------------
walls=()
rsss=()
if [[ "$SKIP_LOTDRIFT" != 1 ]]; then
    for (( i = 1; i <= REPEAT; i++ )); do
        run_dir="$work/run-$i"
        "$bin_dir/lotdrift" init "$run_dir" >"$work/init-$i.log" 2>&1 \
            || { cat "$work/init-$i.log" >&2; die "lotdrift init $run_dir failed"; }
        [[ -f "$run_dir/lotdrift.toml" ]] || die "lotdrift init did not write $run_dir/lotdrift.toml"
        mkdir -p "$run_dir/inbox"
        # Copy (not hard-link): lotdrift moves files out of the inbox.
        find "$workload" -maxdepth 1 -name '*.csv' -exec cp -t "$run_dir/inbox/" -- {} +
        sync
        say "run $i/$REPEAT: lotdrift run --config $run_dir/lotdrift.toml --once"
        time_file="$work/time-$i.txt"
        log_file="$work/run-$i.log"
        start_ns=$(date +%s%N)
        set +e
        /usr/bin/time -v -o "$time_file" \
            "$bin_dir/lotdrift" run --config "$run_dir/lotdrift.toml" --once >"$log_file" 2>&1
        status=$?
        set -e
        end_ns=$(date +%s%N)
        if [[ $status -ne 0 ]]; then
            say "lotdrift exited with status $status; last lines of $log_file:"
            tail -n 20 "$log_file" >&2
            die "lotdrift run failed (KEEP=1 keeps $work)"
        fi
        wall=$(awk -v a="$start_ns" -v b="$end_ns" 'BEGIN { printf "%.3f", (b - a) / 1e9 }')
        rss_kb=$(sed -n 's/^[[:space:]]*Maximum resident set size (kbytes): \([0-9]*\)/\1/p' "$time_file")
        [[ -n "$rss_kb" ]] || die "no 'Maximum resident set size' in $time_file"
        rss=$(awk -v k="$rss_kb" 'BEGIN { printf "%.1f", k / 1024 }')
        left=$(find "$run_dir/inbox" -maxdepth 1 -name '*.csv' | wc -l)
        archived=$(find "$run_dir/archive" -type f 2>/dev/null | wc -l)
        quarantined=$(find "$run_dir/quarantine" -type f 2>/dev/null | wc -l)
        walls+=("$wall")
        rsss+=("$rss")
        printf 'lotdrift run %d/%d: wall_s=%s values_per_s=%s peak_rss_mib=%s (inbox left %d, archive %d, quarantine %d files)\n' \
            "$i" "$REPEAT" "$wall" "$(awk -v n="$values" -v w="$wall" 'BEGIN { printf "%.0f", n / w }')" \
            "$rss" "$left" "$archived" "$quarantined"
        [[ "$left" -eq 0 ]] || say "warning: $left lot files were still in the inbox after --once"
        rm -rf "$run_dir/inbox" # keep the database and logs, free the copy
    done
fi

# --- summary ----------------------------------------------------------------
echo
echo "== ingest benchmark: $files files, $values values (${workload_mib} MiB), $REPEAT run(s) each =="
if [[ -n "$floor_median" ]]; then
    printf 'floor     median: wall_s=%s values_per_s=%s (batch=%s)\n' "$floor_median" \
        "$(awk -v n="$values" -v w="$floor_median" 'BEGIN { printf "%.0f", n / w }')" "$FLOOR_BATCH"
fi
if [[ ${#walls[@]} -gt 0 ]]; then
    wall_median=$(printf '%s\n' "${walls[@]}" | median)
    rss_median=$(printf '%s\n' "${rsss[@]}" | median)
    printf 'lotdrift  median: wall_s=%s values_per_s=%s peak_rss_mib=%s' "$wall_median" \
        "$(awk -v n="$values" -v w="$wall_median" 'BEGIN { printf "%.0f", n / w }')" "$rss_median"
    if [[ -n "$floor_median" ]]; then
        printf ' ratio_to_floor=%s' "$(awk -v a="$wall_median" -v b="$floor_median" 'BEGIN { printf "%.2f", a / b }')"
    fi
    printf '\n'
fi
