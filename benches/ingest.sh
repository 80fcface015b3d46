#!/usr/bin/env bash
# Ingest benchmark: lotdrift against the floor (benches/ingest_floor.rs, a minimal program
# written with rusqlite: parses the same files on worker threads, inserts every value through
# one prepared statement in one SQLite transaction, Welch + Benjamini–Hochberg on the lot
# summaries; see its doc comment).
#
#   1. finds the binaries (benches/common.sh): LOTDRIFT_BIN / LOTDRIFT_BIN_B / WORKLOAD_BIN,
#      or builds this checkout (cargo build --release --bins) when LOTDRIFT_BIN is unset,
#   2. generates a workload with lotdrift-workload into a temp dir,
#   3. runs the floor (cargo bench --bench ingest_floor; built from this checkout whatever
#      binaries are measured) REPEAT times on it,
#   4. REPEAT rounds, each running binary A then binary B (when given): fresh dir,
#      `lotdrift init DIR`, the workload copied into DIR/inbox with an mtime an hour old (so
#      the files are settled and `run --once` takes them at once), and
#      `lotdrift run --config DIR/lotdrift.toml --once` timed under /usr/bin/time -v
#      (wall time, peak RSS),
#   5. prints each run, the medians per binary, the ratio to the floor and, with B, B / A.
#
# With POSTGRES=1 each round also runs binary A on a PostgreSQL history (label P): a private
# server started by this script (Debian's postgresql, fsync on), a fresh database per run,
# `[database] url` in the run's config; the summary adds P / A (PostgreSQL against SQLite).
#
# Knobs (environment):
#   LOTDRIFT_BIN, LOTDRIFT_BIN_B, WORKLOAD_BIN   binaries to measure (benches/common.sh)
#   SOURCES=200 CHARACTERISTICS=3 LOTS=200 UNITS=32   workload size (default 3.84 M values)
#   LAYOUT=mixed           long | wide | mixed
#   SEED=1                 generator seed
#   REPEAT=3               runs of the floor, and rounds of lotdrift (per binary)
#   FLOOR_BATCH=1          rows per INSERT execution in the floor (1 = one per value)
#   FLOOR_THREADS=         parser threads of the floor (default: available cores)
#   WORKLOAD_DIR=path      use this existing folder of lot files instead of generating one
#   SKIP_FLOOR=1           do not run the floor (no ratio is printed)
#   SKIP_LOTDRIFT=1        only generate and run the floor
#   POSTGRES=1             also run binary A on PostgreSQL (label P) and print P / A
#   KEEP=1                 keep the temp dir (workload, run dirs, logs) for inspection
#   BENCH_TMP=/path        parent of the temp dir (default: $TMPDIR or /tmp)
#
# Examples:
#   SOURCES=20 LOTS=50 REPEAT=3 bash benches/ingest.sh                      # a quick one
#   LOTDRIFT_BIN=/path/before/lotdrift LOTDRIFT_BIN_B=/path/after/lotdrift bash benches/ingest.sh
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

[[ "$REPEAT" =~ ^[1-9][0-9]*$ ]] || die "REPEAT must be a positive integer (got '$REPEAT')"
for v in SOURCES CHARACTERISTICS LOTS UNITS; do
    [[ "${!v}" =~ ^[1-9][0-9]*$ ]] || die "$v must be a positive integer (got '${!v}')"
done

bench_name=ingest.sh
# shellcheck source=benches/common.sh
source "$(dirname "${BASH_SOURCE[0]}")/common.sh"
cd "$repo"

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

# --- binaries ---------------------------------------------------------------
resolve_binaries

work="$(mktemp -d "${BENCH_TMP:-${TMPDIR:-/tmp}}/lotdrift-ingest-bench.XXXXXX")"
cleanup() {
    if [[ "$KEEP" == 1 ]]; then
        say "kept $work"
    else
        rm -rf "$work"
    fi
}
trap 'stop_postgres; cleanup' EXIT
say "scratch dir: $work"
if [[ "${POSTGRES:-0}" == 1 && "$SKIP_LOTDRIFT" != 1 ]]; then
    start_postgres "$work/pg"
    LABELS+=(P)
fi

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
    gen_out="$("$WORKLOAD" --out "$workload" \
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

# --- floor ------------------------------------------------------------------
floor_median=""
if [[ "$SKIP_FLOOR" != 1 ]]; then
    say "running the floor $REPEAT time(s): cargo bench --bench ingest_floor (batch=$FLOOR_BATCH)"
    floor_log="$work/floor.log"
    LOTDRIFT_BENCH_DIR="$workload" LOTDRIFT_BENCH_REPEAT="$REPEAT" \
        LOTDRIFT_BENCH_BATCH="$FLOOR_BATCH" LOTDRIFT_BENCH_DB_DIR="$work" \
        ${FLOOR_THREADS:+LOTDRIFT_BENCH_THREADS="$FLOOR_THREADS"} \
        cargo bench --bench ingest_floor 2>&1 | tee "$floor_log" | grep '^ingest_floor:' \
        || die "the floor failed; see output above or $floor_log (KEEP=1 keeps it)"
    floor_median=$(sed -n 's/^ingest_floor: median wall_s=\([0-9.]*\).*/\1/p' "$floor_log")
    [[ -n "$floor_median" ]] || die "no median line in the floor's output ($floor_log)"
fi

# --- lotdrift ---------------------------------------------------------------
declare -A WALLS RSSS # [label] = "v v v"
run_lotdrift() { # label round
    local label="$1" i="$2" bin
    if [[ "$label" == P ]]; then bin="$BIN_A"; else bin="$(bin_of "$label")"; fi
    local run_dir="$work/run-$label-$i"
    "$bin" init "$run_dir" >"$work/init-$label-$i.log" 2>&1 \
        || { cat "$work/init-$label-$i.log" >&2; die "lotdrift init $run_dir failed"; }
    [[ -f "$run_dir/lotdrift.toml" ]] || die "lotdrift init did not write $run_dir/lotdrift.toml"
    if [[ "$label" == P ]]; then
        printf '\n[database]\nurl = "%s"\n' "$(postgres_database "bench_$i")" >>"$run_dir/lotdrift.toml"
    fi
    mkdir -p "$run_dir/inbox"
    # Copy (not hard-link): lotdrift moves files out of the inbox. Then an mtime an hour
    # old: `run --once` takes settled files at once, and would otherwise wait up to the
    # settle interval (2 s) for the files copied last.
    find "$workload" -maxdepth 1 -name '*.csv' -exec cp -t "$run_dir/inbox/" -- {} +
    find "$run_dir/inbox" -maxdepth 1 -name '*.csv' -exec touch -d '1 hour ago' -- {} +
    sync
    say "round $i/$REPEAT, binary $label: lotdrift run --config $run_dir/lotdrift.toml --once"
    local time_file="$work/time-$label-$i.txt" log_file="$work/run-$label-$i.log"
    local start_ns end_ns status
    start_ns=$(date +%s%N)
    set +e
    /usr/bin/time -v -o "$time_file" \
        "$bin" run --config "$run_dir/lotdrift.toml" --once >"$log_file" 2>&1
    status=$?
    set -e
    end_ns=$(date +%s%N)
    if [[ $status -ne 0 ]]; then
        say "lotdrift exited with status $status; last lines of $log_file:"
        tail -n 20 "$log_file" >&2
        die "lotdrift run failed (KEEP=1 keeps $work)"
    fi
    local wall rss_kb rss left archived quarantined
    wall=$(awk -v a="$start_ns" -v b="$end_ns" 'BEGIN { printf "%.3f", (b - a) / 1e9 }')
    rss_kb=$(sed -n 's/^[[:space:]]*Maximum resident set size (kbytes): \([0-9]*\)/\1/p' "$time_file")
    [[ -n "$rss_kb" ]] || die "no 'Maximum resident set size' in $time_file"
    rss=$(awk -v k="$rss_kb" 'BEGIN { printf "%.1f", k / 1024 }')
    left=$(find "$run_dir/inbox" -maxdepth 1 -name '*.csv' | wc -l)
    archived=$(find "$run_dir/archive" -type f 2>/dev/null | wc -l)
    quarantined=$(find "$run_dir/quarantine" -type f 2>/dev/null | wc -l)
    WALLS[$label]+="$wall "
    RSSS[$label]+="$rss "
    printf 'lotdrift %s run %d/%d: wall_s=%s values_per_s=%s peak_rss_mib=%s (inbox left %d, archive %d, quarantine %d files)\n' \
        "$label" "$i" "$REPEAT" "$wall" "$(awk -v n="$values" -v w="$wall" 'BEGIN { printf "%.0f", n / w }')" \
        "$rss" "$left" "$archived" "$quarantined"
    [[ "$left" -eq 0 ]] || say "warning: $left lot files were still in the inbox after --once"
    rm -rf "$run_dir/inbox" # keep the database and logs, free the copy
}
if [[ "$SKIP_LOTDRIFT" != 1 ]]; then
    machine_note
    for (( i = 1; i <= REPEAT; i++ )); do
        for label in "${LABELS[@]}"; do
            run_lotdrift "$label" "$i"
        done
    done
    machine_note
fi

# --- summary ----------------------------------------------------------------
echo
echo "== ingest benchmark: $files files, $values values (${workload_mib} MiB), $REPEAT run(s) each =="
if [[ -n "$floor_median" ]]; then
    printf 'floor     median: wall_s=%s values_per_s=%s (batch=%s)\n' "$floor_median" \
        "$(awk -v n="$values" -v w="$floor_median" 'BEGIN { printf "%.0f", n / w }')" "$FLOOR_BATCH"
fi
declare -A WALL_MEDIAN
for label in "${LABELS[@]}"; do
    [[ -n "${WALLS[$label]:-}" ]] || continue
    wall_median=$(tr ' ' '\n' <<<"${WALLS[$label]}" | grep . | median)
    rss_median=$(tr ' ' '\n' <<<"${RSSS[$label]}" | grep . | median)
    WALL_MEDIAN[$label]="$wall_median"
    printf 'lotdrift %s median: wall_s=%s values_per_s=%s peak_rss_mib=%s' "$label" "$wall_median" \
        "$(awk -v n="$values" -v w="$wall_median" 'BEGIN { printf "%.0f", n / w }')" "$rss_median"
    if [[ -n "$floor_median" ]]; then
        printf ' ratio_to_floor=%s' "$(ratio "$wall_median" "$floor_median")"
    fi
    if [[ "$label" == P ]]; then printf '  (A on PostgreSQL)\n'; else printf '  (%s)\n' "$(bin_of "$label")"; fi
done
if [[ -n "${WALL_MEDIAN[P]:-}" && -n "${WALL_MEDIAN[A]:-}" ]]; then
    printf 'P / A wall time (PostgreSQL / SQLite): %s\n' "$(ratio "${WALL_MEDIAN[P]}" "${WALL_MEDIAN[A]}")"
fi
if [[ -n "${WALL_MEDIAN[B]:-}" && -n "${WALL_MEDIAN[A]:-}" ]]; then
    printf 'B / A wall time: %s\n' "$(ratio "${WALL_MEDIAN[B]}" "${WALL_MEDIAN[A]}")"
fi
