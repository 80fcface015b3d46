#!/usr/bin/env bash
# Drop-to-alert latency benchmark (issue 10): how long from the rename of a lot file into the
# inbox to the alert's log event, on a large database with a steady stream of other files
# arriving, and on a small one.
#
#   1. set-up, cached (see LATENCY_CACHE):
#      - probes: DROPS sources probe-001, probe-002, ... with 20 baseline lots each and a
#        21st lot shifted by PROBE_SHIFT unit sd on every characteristic (lotdrift-workload);
#      - the large set: the ingest.sh workload (SOURCES x CHARACTERISTICS x LOTS x UNITS,
#        mixed layout, every tenth source shifted from lot 3/4 LOTS) generated with a few
#        more lots per source; the extra lots are the feed;
#      - per binary, two databases built with one `lotdrift run --once` each: "large" (the
#        large set's first LOTS lots + the probes' baselines; 40,000 lots by default) and
#        "small" (the probes' baselines only, DROPS x 20 lots).
#   2. ROUNDS times, for each database and binaries A and B in turn: copy the database, start
#      `lotdrift run` on it (JSON log), and run the timer (benches/latency.rs, built with
#      `cargo bench --bench latency --no-run`): it feeds the inbox (FEED_RATE files per second
#      on the large database, SMALL_FEED_RATE on the small one), drops one probe lot every
#      DROP_INTERVAL seconds (written as NAME.part, then renamed), and times each rename to
#      the first alert event of that probe's source read from the daemon's log pipe. Drops
#      keep their schedule whatever the daemon does (open loop): a daemon that cannot keep up
#      shows growing latencies, and drops without an alert within TIMEOUT s count as missed.
#   3. prints each drop and run, then per database and binary p50 / p99 / max over all drops
#      of all rounds, and with B the ratios B / A.
#
# Knobs (environment; see benches/common.sh for LOTDRIFT_BIN, LOTDRIFT_BIN_B, WORKLOAD_BIN):
#   ROUNDS=1                 daemon runs per database and binary (each DROPS drops)
#   DROPS=50 DROP_INTERVAL=1.0 TIMEOUT=10    probes dropped, seconds apart, wait per drop
#   FEED_RATE=20 SMALL_FEED_RATE=0           files per second of the stream (0 = none)
#   DATABASES="large small"                  which databases to measure
#   SOURCES=200 CHARACTERISTICS=3 LOTS=200 UNITS=32 SEED=1   the large set
#   PROBE_UNITS=32 PROBE_SHIFT=6             the probes
#   LATENCY_CACHE=dir        cached sets and databases (default:
#                            ${BENCH_CACHE:-/tmp/lotdrift-bench-cache}/latency)
#   BENCH_TMP=/path KEEP=1   scratch dir parent; keep it (daemon logs are in it)
#
# Example: LOTDRIFT_BIN=/work/bin-before/lotdrift bash benches/latency.sh
#          SOURCES=20 LOTS=100 DROPS=10 bash benches/latency.sh     # a quick one
# The large set-up takes about as long as one ingest.sh run per binary and keeps about 1.2 GiB
# (lot files and databases); later runs reuse it.
set -euo pipefail

bench_name=latency.sh
# shellcheck source=benches/common.sh
source "$(dirname "${BASH_SOURCE[0]}")/common.sh"

ROUNDS="${ROUNDS:-1}"
DROPS="${DROPS:-50}"
DROP_INTERVAL="${DROP_INTERVAL:-1.0}"
TIMEOUT="${TIMEOUT:-10}"
FEED_RATE="${FEED_RATE:-20}"
SMALL_FEED_RATE="${SMALL_FEED_RATE:-0}"
DATABASES="${DATABASES:-large small}"
SOURCES="${SOURCES:-200}"
CHARACTERISTICS="${CHARACTERISTICS:-3}"
LOTS="${LOTS:-200}"
UNITS="${UNITS:-32}"
SEED="${SEED:-1}"
PROBE_UNITS="${PROBE_UNITS:-32}"
PROBE_SHIFT="${PROBE_SHIFT:-6}"
KEEP="${KEEP:-0}"
WARMUP=2
CACHE="${LATENCY_CACHE:-${BENCH_CACHE:-/tmp/lotdrift-bench-cache}/latency}"
for v in ROUNDS DROPS SOURCES CHARACTERISTICS LOTS UNITS SEED PROBE_UNITS; do positive_int "$v"; done
(( DROPS <= 999 )) || die "DROPS must be at most 999"
for db in $DATABASES; do
    [[ "$db" == large || "$db" == small ]] || die "DATABASES: unknown database '$db' (large, small)"
done

resolve_binaries

# The timer, built from this checkout (it is an instrument, not the binary under test).
say "building the timer (cargo bench --bench latency --no-run)"
timer="$(cd "$repo" && cargo bench --bench latency --no-run --message-format=json |
    jq -r 'select(.reason == "compiler-artifact" and .target.name == "latency") | .executable // empty' |
    tail -n 1)"
[[ -n "$timer" && -x "$timer" ]] || die "could not find the latency timer executable"

work="$(mktemp -d "${BENCH_TMP:-${TMPDIR:-/tmp}}/lotdrift-latency-bench.XXXXXX")"
cleanup() { if [[ "$KEEP" == 1 ]]; then say "kept $work"; else rm -rf "$work"; fi; }
trap cleanup EXIT
mkdir -p "$CACHE"

# --- set-up -----------------------------------------------------------------
probes="$CACHE/probes-p$DROPS-u$PROBE_UNITS-x$PROBE_SHIFT-s$SEED"
if [[ ! -f "$probes/.done" ]]; then
    rm -rf "$probes" && mkdir -p "$probes/baseline" "$probes/drops"
    names="$(seq -f 'probe-%03g' 1 "$DROPS" | paste -sd,)"
    say "generating $DROPS probe sources (20 baseline lots + 1 lot shifted by $PROBE_SHIFT sd)"
    "$WORKLOAD" --out "$probes/gen" --source-names "$names" --characteristics "$CHARACTERISTICS" \
        --lots 21 --units "$PROBE_UNITS" --between-lot-sd 0.1 --layout mixed \
        --seed "$((SEED + 1000))" --shift "*:*:21:$PROBE_SHIFT" >&2
    find "$probes/gen" -name '*_L021.csv' -exec mv -t "$probes/drops/" {} +
    find "$probes/gen" -name '*.csv' -exec mv -t "$probes/baseline/" {} +
    rmdir "$probes/gen"
    touch "$probes/.done"
fi

# Lots per source generated for the large set: LOTS stored, the rest fed during a run.
# The feed lasts the warm-up, the drops and the wait for the last drop's alert.
feed_needed=$(awk -v r="$FEED_RATE" -v w="$WARMUP" -v d="$DROPS" -v i="$DROP_INTERVAL" -v t="$TIMEOUT" \
    'BEGIN { printf "%d", r * (w + d * i + t + 1) + 0.999 }')
extra=$(( (feed_needed + SOURCES - 1) / SOURCES ))
(( extra >= 1 )) || extra=1
large="$CACHE/large-s$SOURCES-c$CHARACTERISTICS-l$LOTS+$extra-u$UNITS-s$SEED"
if [[ " $DATABASES " == *" large "* && ! -f "$large/.done" ]]; then
    rm -rf "$large" && mkdir -p "$large/stored" "$large/feed"
    shift_from=$(( LOTS * 3 / 4 > 0 ? LOTS * 3 / 4 : 1 ))
    shift_args=()
    for (( s = 1; s <= SOURCES; s += 10 )); do
        shift_args+=(--shift "$(printf 'source-%03d' "$s"):*:$shift_from:1.0")
    done
    say "generating the large set: $SOURCES sources x $CHARACTERISTICS characteristics x $((LOTS + extra)) lots x $UNITS units"
    "$WORKLOAD" --out "$large/gen" --sources "$SOURCES" --characteristics "$CHARACTERISTICS" \
        --lots "$((LOTS + extra))" --units "$UNITS" --between-lot-sd 0.1 --layout mixed \
        --seed "$SEED" --comment-every 10 "${shift_args[@]}" >&2
    # Lot numbers above LOTS are the feed (names end in _L<number>.csv).
    find "$large/gen" -name '*.csv' -printf '%f\n' | awk -v lots="$LOTS" -v gen="$large/gen" \
        -v stored="$work/to-stored" -v feed="$work/to-feed" '{
            n = $0; sub(/\.csv$/, "", n); sub(/.*_L/, "", n)
            print gen "/" $0 > ((n + 0 > lots) ? feed : stored)
        }'
    xargs -d '\n' -a "$work/to-stored" mv -t "$large/stored/"
    xargs -d '\n' -a "$work/to-feed" mv -t "$large/feed/"
    rmdir "$large/gen"
    touch "$large/.done"
fi

# Prints the site (config + database) of database `db` built by binary `bin`.
site_for() { # db bin
    local db="$1" bin="$2" site
    if [[ "$db" == large ]]; then
        site="$large/site-$(basename "$probes")-$(bin_key "$bin")"
    else
        site="$probes/site-small-$(bin_key "$bin")"
    fi
    if [[ -f "$site/.done" ]]; then
        printf '%s' "$site"
        return
    fi
    rm -rf "$site"
    "$bin" init "$site" >/dev/null || die "lotdrift init $site failed"
    quiet_silence "$site/lotdrift.toml"
    grep -q '^format = "text"' "$site/lotdrift.toml" || die "no 'format = \"text\"' line in $site/lotdrift.toml"
    sed -i 's/^format = "text"/format = "json"/' "$site/lotdrift.toml"
    # Hard links: ingest moves them away, the cached set stays.
    find "$probes/baseline" -name '*.csv' -exec ln -t "$site/inbox/" {} +
    if [[ "$db" == large ]]; then
        find "$large/stored" -name '*.csv' -exec ln -t "$site/inbox/" {} +
    fi
    find "$site/inbox" -name '*.csv' -exec touch -d '1 hour ago' {} +
    local n t0 t1
    n=$(find "$site/inbox" -name '*.csv' | wc -l)
    say "building the $db database ($n files) with $bin, once (cached in $site)"
    t0=$(now_us)
    "$bin" run --config "$site/lotdrift.toml" --once >"$site/setup.log" 2>&1 ||
        { tail -n 20 "$site/setup.log" >&2; die "set-up ingest failed (log: $site/setup.log)"; }
    t1=$(now_us)
    say "  took $(( (t1 - t0) / 1000000 )) s; $(find "$site/inbox" -name '*.csv' | wc -l) files left in the inbox"
    rm -rf "$site/archive" "$site/inbox" "$site/quarantine"
    touch "$site/.done"
    printf '%s' "$site"
}

declare -A SITE
for db in $DATABASES; do
    for label in "${LABELS[@]}"; do
        SITE[$db,$label]="$(site_for "$db" "$(bin_of "$label")")"
    done
done

# --- timed runs -------------------------------------------------------------
declare -A VALUES # [db,label] = "ms,ms,..."
declare -A RUNS   # [db,label] = summary lines
one_run() { # db label round
    local db="$1" label="$2" round="$3" site run out rate feed_dir
    site="${SITE[$db,$label]}"
    run="$work/run-$db-$label-$round"
    mkdir -p "$run/inbox" "$run/archive" "$run/quarantine"
    cp "$site/lotdrift.toml" "$run/"
    for f in "$site"/lotdrift.db "$site"/lotdrift.db-wal; do
        [[ -f "$f" ]] && cp --reflink=auto "$f" "$run/"
    done
    sync
    if [[ "$db" == large ]]; then rate="$FEED_RATE"; feed_dir="$large/feed"; else rate="$SMALL_FEED_RATE"; feed_dir="$large/feed"; fi
    [[ -d "$feed_dir" ]] || { rate=0; feed_dir=""; }
    say "round $round: $db database, binary $label, feed $rate files/s, $DROPS drops"
    out="$run/timer.out"
    LATENCY_DAEMON="$(bin_of "$label")" LATENCY_CONFIG="$run/lotdrift.toml" \
        LATENCY_INBOX="$run/inbox" LATENCY_DROP_DIR="$probes/drops" LATENCY_DROPS="$DROPS" \
        LATENCY_DROP_INTERVAL="$DROP_INTERVAL" LATENCY_FEED_DIR="$feed_dir" \
        LATENCY_FEED_RATE="$rate" LATENCY_WARMUP="$WARMUP" LATENCY_TIMEOUT="$TIMEOUT" \
        LATENCY_LOG="$run/daemon.log" "$timer" | tee "$out" | grep --line-buffered -v '^latency: values_ms=' ||
        die "the timer failed (KEEP=1 keeps $run)"
    local summary values
    summary="$(grep '^latency: drops=' "$out")" || die "no summary line from the timer"
    values="$(sed -n 's/^latency: values_ms=//p' "$out")"
    VALUES[$db,$label]+="${values},"
    RUNS[$db,$label]+="  round $round: ${summary#latency: }"$'\n'
    if [[ "$KEEP" != 1 ]]; then rm -rf "$run"; fi
}

echo "== latency benchmark: $DROPS drops every ${DROP_INTERVAL}s per run, $ROUNDS round(s) =="
machine_note
for (( round = 1; round <= ROUNDS; round++ )); do
    for db in $DATABASES; do
        for label in "${LABELS[@]}"; do
            one_run "$db" "$label" "$round"
        done
    done
done
machine_note

# --- summary ----------------------------------------------------------------
# p50 p99 max n of comma-separated values (nearest rank).
pct() {
    tr ',' '\n' <<<"$1" | grep . | sort -g | awk '{ v[NR] = $1 }
        END { if (NR == 0) { print "- - - 0"; exit }
              r50 = int(NR * 0.5); if (r50 < NR * 0.5) r50++; if (r50 < 1) r50 = 1
              r99 = int(NR * 0.99); if (r99 < NR * 0.99) r99++; if (r99 < 1) r99 = 1
              printf "%.3f %.3f %.3f %d\n", v[r50], v[r99], v[NR], NR }'
}
echo
echo "drop-to-alert latency, ms, over all drops of all rounds (nearest-rank percentiles)"
for db in $DATABASES; do
    if [[ "$db" == large ]]; then
        what="large: $SOURCES x $CHARACTERISTICS x $LOTS lots x $UNITS units + probe baselines, feed $FEED_RATE files/s"
    else
        what="small: $DROPS probe sources x 20 baseline lots, feed $SMALL_FEED_RATE files/s"
    fi
    echo "-- $what"
    declare -A P=()
    for label in "${LABELS[@]}"; do
        read -r p50 p99 max n <<<"$(pct "${VALUES[$db,$label]:-}")"
        P[$label,50]="$p50"; P[$label,99]="$p99"
        printf '%s: p50_ms=%s p99_ms=%s max_ms=%s drops=%s  (%s)\n' "$label" "$p50" "$p99" "$max" "$n" "$(bin_of "$label")"
        printf '%s' "${RUNS[$db,$label]}"
    done
    if [[ -n "$BIN_B" ]]; then
        printf 'B/A: p50 %s, p99 %s\n' "$(ratio "${P[B,50]/-/}" "${P[A,50]/-/}")" "$(ratio "${P[B,99]/-/}" "${P[A,99]/-/}")"
    fi
    unset P
done
