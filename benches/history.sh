#!/usr/bin/env bash
# History-length benchmark (issue 10): does deciding one new lot, `history` and `status`
# cost the same whatever the length of the stored history?
#
#   1. set-up, once per binary (cached, see HISTORY_CACHE): two databases, each of ONE
#      source with 3 characteristics, one with a SHORT_LOTS-lot history (1,000) and one with
#      a LONG_LOTS-lot history (100,000), UNITS units per lot (5, to keep the set-up short:
#      100,000 lot files, 1.5 M values). The files come from lotdrift-workload (long layout,
#      between-lot sd 0.1, no shift); all but the last lot are ingested with one
#      `lotdrift run --once`; the last lot (sampled after all others) is kept aside.
#   2. REPEAT times, for each history length, and for binaries A and B in turn: copy the
#      database to a scratch dir, put the kept lot file into the inbox with an mtime an hour
#      old (so `run --once` takes it at once instead of waiting for it to settle), and time
#      `lotdrift run --once` (stores 1 file, decides 3 lots); then time
#      `lotdrift history SOURCE`, `lotdrift history SOURCE --csv` (when the binary has
#      --csv), the one series `lotdrift history SOURCE CHARACTERISTIC` as text and with
#      --json (`series`, `series_json`: the issue's "history of a 100,000-lot series") and
#      `lotdrift status` on that database (output to /dev/null).
#   3. prints every run, then per binary the medians (ms) for both lengths and the ratio
#      long / short, and with B the ratio B / A.
#
# Knobs (environment; see benches/common.sh for LOTDRIFT_BIN, LOTDRIFT_BIN_B, WORKLOAD_BIN):
#   REPEAT=5                 timed rounds
#   SHORT_LOTS=1000 LONG_LOTS=100000 UNITS=5 SEED=7   the two histories
#   HISTORY_CACHE=dir        where the built databases are kept between runs
#                            (default: ${BENCH_CACHE:-/tmp/lotdrift-bench-cache}/history)
#   BENCH_TMP=/path          parent of the scratch dir (default: $TMPDIR or /tmp)
#   KEEP=1                   keep the scratch dir
#
# Example: LOTDRIFT_BIN=/work/bin-before/lotdrift LOTDRIFT_BIN_B=target/release/lotdrift \
#          bash benches/history.sh
# Set-up with the default sizes takes about two minutes per binary on the shared 2-core machine
# (generating 100,001 files, then one ingest of 100,000 files at about 620 MiB peak RSS), needs
# 400 MiB of scratch space while it runs and keeps about 350 MiB per binary; later runs reuse it.
set -euo pipefail

bench_name=history.sh
# shellcheck source=benches/common.sh
source "$(dirname "${BASH_SOURCE[0]}")/common.sh"

REPEAT="${REPEAT:-5}"
SHORT_LOTS="${SHORT_LOTS:-1000}"
LONG_LOTS="${LONG_LOTS:-100000}"
UNITS="${UNITS:-5}"
SEED="${SEED:-7}"
KEEP="${KEEP:-0}"
CACHE="${HISTORY_CACHE:-${BENCH_CACHE:-/tmp/lotdrift-bench-cache}/history}"
for v in REPEAT SHORT_LOTS LONG_LOTS UNITS SEED; do positive_int "$v"; done
(( SHORT_LOTS > 20 )) || die "SHORT_LOTS must exceed the 20 baseline lots"

SOURCE=source-001
CHARACTERISTIC=char-001
resolve_binaries

work="$(mktemp -d "${BENCH_TMP:-${TMPDIR:-/tmp}}/lotdrift-history-bench.XXXXXX")"
cleanup() { if [[ "$KEEP" == 1 ]]; then say "kept $work"; else rm -rf "$work"; fi; }
trap cleanup EXIT
mkdir -p "$CACHE"

# --- set-up -----------------------------------------------------------------
# The lot files of one history length: $CACHE/lots-N-uU-sS/{held/,.done}; the bulk of the
# files is only needed until every binary's database is built, so it is generated into the
# scratch dir on demand.
set_dir() { printf '%s/lots-%s-u%s-s%s' "$CACHE" "$1" "$UNITS" "$SEED"; }

generate() { # lots out_dir
    local lots="$1" out="$2"
    say "generating 1 source x 3 characteristics x $((lots + 1)) lots x $UNITS units into $out"
    "$WORKLOAD" --out "$out" --sources 1 --characteristics 3 --lots "$((lots + 1))" \
        --units "$UNITS" --between-lot-sd 0.1 --layout long --seed "$SEED" >&2
}

# Prints the path of the site (config + database) holding `lots` lots, built by `bin`.
site_for() { # lots bin
    local lots="$1" bin="$2"
    local dir site held files
    dir="$(set_dir "$lots")"
    site="$dir/site-$(bin_key "$bin")"
    if [[ -f "$site/.done" && -f "$dir/held/.done" ]]; then
        printf '%s' "$site"
        return
    fi
    files="$work/files-$lots"
    if [[ ! -d "$files" ]]; then
        generate "$lots" "$files"
    fi
    held="$dir/held"
    if [[ ! -f "$held/.done" ]]; then
        rm -rf "$held" && mkdir -p "$held"
        local last
        last="$(find "$files" -maxdepth 1 -name '*.csv' | sort | tail -n 1)"
        cp "$last" "$held/"
        touch "$held/.done"
    fi
    rm -rf "$site"
    "$bin" init "$site" >/dev/null || die "lotdrift init $site failed"
    quiet_silence "$site/lotdrift.toml"
    # Hard links: ingest moves the files to the archive, the generated set stays for the next
    # binary. All but the held-out last lot.
    find "$files" -maxdepth 1 -name '*.csv' | sort | head -n "$lots" |
        xargs -d '\n' ln -t "$site/inbox/"
    # Settled: an mtime an hour old is taken at once by `run --once`.
    find "$site/inbox" -name '*.csv' -exec touch -d '1 hour ago' {} +
    say "ingesting $lots lots with $bin (once per binary; cached in $site)"
    local t0 t1
    t0=$(now_us)
    "$bin" run --config "$site/lotdrift.toml" --once >"$site/setup.log" 2>&1 ||
        { tail -n 20 "$site/setup.log" >&2; die "set-up ingest failed (log: $site/setup.log)"; }
    t1=$(now_us)
    say "set-up ingest took $(( (t1 - t0) / 1000000 )) s; $(find "$site/inbox" -name '*.csv' | wc -l) files left in the inbox"
    rm -rf "$site/archive" "$site/inbox" "$site/quarantine"
    touch "$site/.done"
    printf '%s' "$site"
}

declare -A SITE
for label in "${LABELS[@]}"; do
    bin="$(bin_of "$label")"
    SITE[$label,short]="$(site_for "$SHORT_LOTS" "$bin")"
    SITE[$label,long]="$(site_for "$LONG_LOTS" "$bin")"
done
rm -rf "$work"/files-*

declare -A HAS_CSV
for label in "${LABELS[@]}"; do
    if "$(bin_of "$label")" history --help 2>/dev/null | grep -q -- '--csv'; then
        HAS_CSV[$label]=1
    else
        HAS_CSV[$label]=0
        say "binary $label has no 'history --csv'; that measure is skipped for it"
    fi
done

# --- timed runs -------------------------------------------------------------
declare -A TIMES # [label,length,measure] = "ms ms ms ..."
record() { TIMES[$1,$2,$3]+="$4 "; }

# Runs a command with stdout to /dev/null, prints its wall time in ms (3 decimals).
timed() {
    local t0 t1 status
    t0=$(now_us)
    set +e
    "$@" >/dev/null 2>"$work/last.err"
    status=$?
    set -e
    t1=$(now_us)
    if [[ $status -ne 0 ]]; then
        cat "$work/last.err" >&2
        die "failed (status $status): $*"
    fi
    awk -v a="$t0" -v b="$t1" 'BEGIN { printf "%.3f", (b - a) / 1000 }'
}

one_round() { # label length round
    local label="$1" length="$2" round="$3"
    local bin site run config held ms stored
    bin="$(bin_of "$label")"
    site="${SITE[$label,$length]}"
    run="$work/run-$label-$length"
    rm -rf "$run" && mkdir -p "$run/inbox" "$run/archive" "$run/quarantine"
    cp "$site/lotdrift.toml" "$run/"
    for f in "$site"/lotdrift.db "$site"/lotdrift.db-wal; do
        [[ -f "$f" ]] && cp --reflink=auto "$f" "$run/"
    done
    config="$run/lotdrift.toml"
    held="$(set_dir "$( [[ $length == short ]] && echo "$SHORT_LOTS" || echo "$LONG_LOTS")")/held"
    cp "$held"/*.csv "$run/inbox/"
    touch -d '1 hour ago' "$run"/inbox/*.csv
    sync

    ms=$(timed "$bin" run --config "$config" --once)
    stored=$(find "$run/archive" -type f -name '*.csv' | wc -l)
    [[ "$stored" -eq 1 ]] || die "run --once of $label on the $length history archived $stored files (expected 1)"
    record "$label" "$length" run_once "$ms"
    printf '%-2s %-5s round %d: run_once_ms=%s' "$label" "$length" "$round" "$ms"

    ms=$(timed "$bin" history --config "$config" "$SOURCE")
    record "$label" "$length" history "$ms"
    printf ' history_ms=%s' "$ms"
    if [[ "${HAS_CSV[$label]}" == 1 ]]; then
        ms=$(timed "$bin" history --config "$config" "$SOURCE" --csv)
        record "$label" "$length" history_csv "$ms"
        printf ' history_csv_ms=%s' "$ms"
    fi
    ms=$(timed "$bin" history --config "$config" "$SOURCE" "$CHARACTERISTIC")
    record "$label" "$length" series "$ms"
    printf ' series_ms=%s' "$ms"
    ms=$(timed "$bin" history --config "$config" "$SOURCE" "$CHARACTERISTIC" --json)
    record "$label" "$length" series_json "$ms"
    printf ' series_json_ms=%s' "$ms"
    ms=$(timed "$bin" status --config "$config")
    record "$label" "$length" status "$ms"
    printf ' status_ms=%s\n' "$ms"
    rm -rf "$run"
}

echo "== history benchmark: 1 source x 3 characteristics x $UNITS units; $SHORT_LOTS vs $LONG_LOTS stored lots; $REPEAT round(s) =="
machine_note
for (( round = 1; round <= REPEAT; round++ )); do
    for length in short long; do
        for label in "${LABELS[@]}"; do
            one_round "$label" "$length" "$round"
        done
    done
done
machine_note

# --- summary ----------------------------------------------------------------
med() { # label length measure
    local v="${TIMES[$1,$2,$3]:-}"
    [[ -n "$v" ]] || { printf -- '-'; return; }
    tr ' ' '\n' <<<"$v" | grep . | median
}

echo
echo "medians in ms (short = $SHORT_LOTS lots, long = $LONG_LOTS lots)"
header="measure"
printf '%-12s' "$header"
for label in "${LABELS[@]}"; do
    printf ' %12s %12s %11s' "$label short" "$label long" "$label long/sh"
done
[[ -n "$BIN_B" ]] && printf ' %10s %10s' "B/A short" "B/A long"
printf '\n'
for measure in run_once history history_csv series series_json status; do
    printf '%-12s' "$measure"
    declare -A m=()
    for label in "${LABELS[@]}"; do
        m[$label,short]="$(med "$label" short "$measure")"
        m[$label,long]="$(med "$label" long "$measure")"
        printf ' %12s %12s %11s' "${m[$label,short]}" "${m[$label,long]}" \
            "$(ratio "${m[$label,long]/-/}" "${m[$label,short]/-/}")"
    done
    if [[ -n "$BIN_B" ]]; then
        printf ' %10s %10s' "$(ratio "${m[B,short]/-/}" "${m[A,short]/-/}")" \
            "$(ratio "${m[B,long]/-/}" "${m[A,long]/-/}")"
    fi
    printf '\n'
    unset m
done
