#!/usr/bin/env bash
# Soak: the daemon for several minutes under a steady stream of lot files, a reader querying
# the database the whole time, and the mail server going down and up.
#
#   1. builds lotdrift, lotdrift-workload and the SMTP sink (examples/smtp_sink.rs) in release,
#   2. generates the lot files with lotdrift-workload (some series shift, so alerts open),
#   3. starts `lotdrift run` on a fresh site (log and email channels, email to the sink),
#   4. for DURATION seconds: moves RATE files a second into the inbox (rename, as a careful
#      lab PC does); a reader runs `lotdrift status --json` and `lotdrift history` in a loop;
#      the sink runs SMTP_UP seconds, is stopped for SMTP_DOWN seconds, and so on; the
#      daemon's VmRSS and VmHWM are sampled from /proc every 2 s,
#   5. starts the sink for good, waits until the inbox is empty and the outbox has nothing
#      pending, stops the daemon with SIGTERM,
#   6. checks and prints: every file stored exactly once (files dropped, ingested_file rows,
#      lots, archive, quarantine, inbox), every message delivered exactly once (Message-IDs
#      received by the sink against the outbox: no duplicate, none missing), the reader's
#      failures, the health notices, and the daemon's peak and final RSS and whether memory
#      stayed flat (the median RSS of the run's last third at most 10 %, or 5 MiB, above that
#      of its middle third). Exits 1 when a check fails.
#
# Knobs (environment):
#   DURATION=300      seconds of arriving files
#   RATE=8            files per second
#   SOURCES=20        sources (3 characteristics each, UNITS units per lot)
#   UNITS=16
#   SMTP_UP=60        seconds the mail server runs ...
#   SMTP_DOWN=40      ... and is down, in turn (the last period ends with it up)
#   NOTICE_MINUTES=0.25   health.notice_after_minutes of the site
#   DRAIN_LIMIT=300   seconds to wait for the inbox and the outbox to empty at the end
#   PORT=             SMTP port (default: a free one)
#   KEEP=1            keep the work folder (site, sink folder, logs, RSS samples)
#   SOAK_TMP=/path    parent of the work folder (default: $TMPDIR or /tmp)
#
# Example (quick): DURATION=60 SMTP_UP=20 SMTP_DOWN=15 bash benches/soak.sh
set -euo pipefail

DURATION="${DURATION:-300}"
RATE="${RATE:-8}"
SOURCES="${SOURCES:-20}"
UNITS="${UNITS:-16}"
SMTP_UP="${SMTP_UP:-60}"
SMTP_DOWN="${SMTP_DOWN:-40}"
NOTICE_MINUTES="${NOTICE_MINUTES:-0.25}"
DRAIN_LIMIT="${DRAIN_LIMIT:-300}"
KEEP="${KEEP:-0}"

say() { printf '[soak.sh] %s\n' "$*" >&2; }
die() { say "error: $*"; exit 1; }

for v in DURATION RATE SOURCES UNITS SMTP_UP SMTP_DOWN DRAIN_LIMIT; do
    [[ "${!v}" =~ ^[1-9][0-9]*$ ]] || die "$v must be a positive integer (got '${!v}')"
done
command -v python3 >/dev/null || die "python3 is needed for the final count"

repo="$(cd "$(dirname "${BASH_SOURCE[0]}")/.." && pwd)"
cd "$repo"
target_dir="${CARGO_TARGET_DIR:-$repo/target}"
bin="$target_dir/release"

say "building (release): lotdrift, lotdrift-workload, examples/smtp_sink"
cargo build --release --quiet --bin lotdrift --bin lotdrift-workload --example smtp_sink
sink_bin="$bin/examples/smtp_sink"

work="$(mktemp -d "${SOAK_TMP:-${TMPDIR:-/tmp}}/lotdrift-soak.XXXXXX")"
site="$work/site"
mail="$work/mail"
stop_flag="$work/stop"
pids=()
cleanup() {
    touch "$stop_flag" 2>/dev/null || true
    for p in "${pids[@]:-}"; do
        [[ -n "$p" ]] && kill "$p" 2>/dev/null || true
    done
    [[ -n "${sink_pid:-}" ]] && kill "$sink_pid" 2>/dev/null || true
    [[ -n "${daemon_pid:-}" ]] && kill "$daemon_pid" 2>/dev/null || true
    if [[ "$KEEP" == 1 ]]; then say "kept $work"; else rm -rf "$work"; fi
}
trap cleanup EXIT

PORT="${PORT:-$(python3 -c 'import socket; s=socket.socket(); s.bind(("127.0.0.1",0)); print(s.getsockname()[1])')}"

# --- workload ----------------------------------------------------------------
lots=$(( DURATION * RATE / SOURCES + 1 ))
say "workload: $SOURCES sources x 3 characteristics x $lots lots x $UNITS units"
"$bin/lotdrift-workload" --out "$work/lots" --sources "$SOURCES" --characteristics 3 \
    --lots "$lots" --units "$UNITS" --between-lot-sd 0.1 --layout mixed --seed 7 \
    --shift "*:char-001:$(( lots / 3 + 1 )):1.5" \
    --shift "source-002:char-002:$(( lots / 2 + 1 )):2.0" \
    --shift "source-005:char-003:$(( 2 * lots / 3 + 1 )):2.0" >/dev/null
# Arrival order: lot by lot, every source's lot N before any lot N+1.
(cd "$work/lots" && ls | sort -t_ -k2,2 -k1,1) > "$work/order"

# --- site ----------------------------------------------------------------------
mkdir -p "$site"
"$bin/lotdrift" init "$site" >/dev/null
cat > "$site/lotdrift.toml" <<EOF
[watch]
settle_seconds = 0.5
rescan_seconds = 5.0

[monitor]
# The workload's lots are dated in the past: every source would be silent.
silence = false

[alerts]
channels = ["log", "email"]
retry_initial_seconds = 2
retry_max_seconds = 10

[alerts.email]
smtp_host = "127.0.0.1"
smtp_port = $PORT
tls = "none"
from = "lotdrift <lotdrift@soak.example>"
to = ["quality@soak.example"]
timeout_seconds = 5

[health]
notice_after_minutes = $NOTICE_MINUTES
EOF
cfg="$site/lotdrift.toml"

start_sink() {
    "$sink_bin" "$PORT" "$mail" 2>>"$work/sink.log" &
    sink_pid=$!
}
stop_sink() {
    kill "$sink_pid" 2>/dev/null || true
    wait "$sink_pid" 2>/dev/null || true
    sink_pid=""
}

LOTDRIFT_LOG=lotdrift=info "$bin/lotdrift" run --config "$cfg" 2>"$work/daemon.log" >/dev/null &
daemon_pid=$!
start_sink

# --- feeder: RATE files a second, renamed into the inbox ------------------------
(
    fed=0
    start=$(date +%s)
    while read -r f; do
        [[ -e "$stop_flag" ]] && break
        mv "$work/lots/$f" "$site/inbox/$f"
        fed=$(( fed + 1 ))
        echo "$fed" > "$work/fed"
        if (( fed % RATE == 0 )); then
            # Keep to RATE files per second of wall time.
            target=$(( start + fed / RATE ))
            while (( $(date +%s) < target )); do sleep 0.1; done
        fi
        (( $(date +%s) - start >= DURATION )) && break
    done < "$work/order"
) &
feeder_pid=$!
pids+=("$feeder_pid")

# --- reader: status and history the whole time ----------------------------------
(
    # The first lots must be stored before `history` can find their sources.
    until "$bin/lotdrift" history source-002 char-001 --config "$cfg" >/dev/null 2>&1; do
        [[ -e "$stop_flag" ]] && break
        sleep 0.2
    done
    ok=0; failed=0
    while [[ ! -e "$stop_flag" ]]; do
        for args in "status --json" "history source-001" "history source-002 char-001 --json"; do
            # shellcheck disable=SC2086
            if "$bin/lotdrift" $args --config "$cfg" >/dev/null 2>>"$work/reader.err"; then
                ok=$(( ok + 1 ))
            else
                failed=$(( failed + 1 ))
            fi
        done
        echo "$ok $failed" > "$work/reader"
    done
) &
reader_pid=$!
pids+=("$reader_pid")

# --- the mail server down and up; RSS samples ------------------------------------
# Seconds, VmRSS and VmHWM (KiB) of the daemon, and the database file's size (bytes).
sample() {
    local db
    db=$(stat -c %s "$site/lotdrift.db" 2>/dev/null || echo 0)
    awk -v t="$1" -v db="$db" '/^VmRSS:/ {r=$2} /^VmHWM:/ {h=$2} END {print t, r, h, db}' \
        "/proc/$daemon_pid/status" >> "$work/rss" 2>/dev/null || true
}
say "soaking for $DURATION s (mail server up $SMTP_UP s, down $SMTP_DOWN s, in turn); work folder $work"
t0=$(date +%s)
downs=0
while :; do
    t=$(( $(date +%s) - t0 ))
    (( t >= DURATION )) && break
    kill -0 "$daemon_pid" 2>/dev/null || die "the daemon exited; see $work/daemon.log"
    phase=$(( t % (SMTP_UP + SMTP_DOWN) ))
    if (( phase < SMTP_UP )) && [[ -z "${sink_pid:-}" ]]; then
        start_sink
    elif (( phase >= SMTP_UP )) && [[ -n "${sink_pid:-}" ]]; then
        stop_sink
        downs=$(( downs + 1 ))
    fi
    (( t % 2 == 0 )) && sample "$t"
    sleep 1
done
wait "$feeder_pid" 2>/dev/null || true
[[ -z "${sink_pid:-}" ]] && start_sink

# --- drain ----------------------------------------------------------------------
say "files stopped after $(cat "$work/fed") files; waiting for the inbox and the outbox to empty"
pending() {
    "$bin/lotdrift" status --json --config "$cfg" 2>/dev/null \
        | python3 -c 'import json,sys; print(json.load(sys.stdin)["outbox_pending"])' 2>/dev/null \
        || echo 1
}
drained=0
for (( i = 0; i < DRAIN_LIMIT; i++ )); do
    t=$(( $(date +%s) - t0 ))
    (( t % 2 == 0 )) && sample "$t"
    left=$(find "$site/inbox" -type f | wc -l)
    if (( left == 0 )) && [[ "$(pending)" == 0 ]]; then drained=1; break; fi
    sleep 1
done
touch "$stop_flag"
wait "$reader_pid" 2>/dev/null || true
sample "$(( $(date +%s) - t0 ))"
kill -TERM "$daemon_pid"
daemon_exit=0
wait "$daemon_pid" || daemon_exit=$?
daemon_pid=""
stop_sink

# --- count ------------------------------------------------------------------------
python3 - "$work" "$site" "$(cat "$work/fed")" "$drained" "$daemon_exit" "$downs" "$DURATION" <<'EOF'
import collections, email, email.policy, os, re, sqlite3, statistics, sys

work, site, fed, drained, daemon_exit, downs, duration = sys.argv[1:]
fed, drained, daemon_exit, downs = int(fed), drained == "1", int(daemon_exit), int(downs)
failures = []

def check(ok, text):
    print(("  ok    " if ok else "  FAIL  ") + text)
    if not ok:
        failures.append(text)

def files_under(path, keep=lambda p: True):
    out = []
    for d, _, names in os.walk(path):
        out += [os.path.join(d, n) for n in names if keep(os.path.join(d, n))]
    return out

db = sqlite3.connect(f"file:{site}/lotdrift.db?mode=ro", uri=True)
q = lambda sql: db.execute(sql).fetchone()[0]
stored, lots = q("SELECT COUNT(*) FROM ingested_file"), q("SELECT COUNT(*) FROM lot")
archived = files_under(f"{site}/archive", lambda p: "/duplicates/" not in p)
duplicates = files_under(f"{site}/archive", lambda p: "/duplicates/" in p)
quarantined = files_under(f"{site}/quarantine")
inbox = files_under(f"{site}/inbox")
print(f"\nFiles: dropped {fed}, stored rows {stored}, lots {lots}, archived {len(archived)}, "
      f"archived as duplicates {len(duplicates)}, quarantined {len(quarantined)}, left in inbox {len(inbox)}")
check(drained, "inbox and outbox emptied before the drain limit")
check(stored == fed and lots == fed and len(archived) == fed, "every file stored exactly once and archived")
check(not duplicates and not quarantined and not inbox, "no duplicate, no quarantine, nothing left")

# Message-IDs the outbox stands for (as alert.rs builds them), one per email row.
digits = lambda s: re.sub(r"\D", "", s)
expected = collections.Counter()
for kind, ref, at, oid in db.execute(
        "SELECT CASE WHEN o.alert_event_id IS NOT NULL THEN 'event' "
        "WHEN o.digest_id IS NOT NULL THEN 'digest' "
        "WHEN o.silence_event_id IS NOT NULL THEN 'silence' ELSE 'health' END, "
        "COALESCE(o.alert_event_id, o.digest_id, o.silence_event_id, o.health_event_id), "
        "COALESCE(ae.at, se.at, he.at, ''), o.id FROM outbox o "
        "LEFT JOIN alert_event ae ON ae.id = o.alert_event_id "
        "LEFT JOIN silence_event se ON se.id = o.silence_event_id "
        "LEFT JOIN health_event he ON he.id = o.health_event_id "
        "WHERE o.channel = 'email'"):
    tail = oid if kind == "digest" else digits(at)
    expected[f"<lotdrift.{kind}-{ref}.{tail}@soak.example>"] += 1
received = collections.Counter()
for path in files_under(f"{work}/mail", lambda p: p.endswith(".eml")):
    with open(path, "rb") as f:
        m = email.message_from_binary_file(f, policy=email.policy.default)
    received[str(m["Message-ID"]).strip()] += 1
states = dict(db.execute("SELECT state, COUNT(*) FROM outbox WHERE channel = 'email' GROUP BY state").fetchall())
events = q("SELECT COUNT(DISTINCT alert_event_id) FROM outbox WHERE channel = 'email' AND alert_event_id IS NOT NULL")
alert_ids = [i for i in received if i.startswith("<lotdrift.event-")]
dups = {i: n for i, n in received.items() if n > 1}
missing = set(expected) - set(received)
unexpected = set(received) - set(expected)
print(f"\nMessages: email rows in the outbox {sum(expected.values())} {states}; received {sum(received.values())} "
      f"({len(received)} distinct Message-IDs); alert events announced by email {events}, "
      f"received {len(alert_ids)}; duplicates {len(dups)}, missing {len(missing)}, unexpected {len(unexpected)}")
check(set(states) <= {"delivered"}, "every email row delivered (none pending, failed or expired)")
check(not dups, f"no message received twice {sorted(dups)[:5]}")
check(not missing and not unexpected, f"received = outbox {sorted(missing)[:3]} {sorted(unexpected)[:3]}")
check(len(alert_ids) == events, "every alert event delivered exactly once")

health = db.execute("SELECT component, kind, COUNT(*) FROM health_event GROUP BY 1, 2 ORDER BY 1, 2").fetchall()
print(f"\nMail server stopped {downs} times; health notices {health or 'none'}")
for component in ("ingest", "delivery"):
    kinds = [k for (k,) in db.execute("SELECT kind FROM health_event WHERE component = ? ORDER BY id", (component,))]
    check(all(a != b for a, b in zip(kinds, kinds[1:])), f"{component}: stuck and recovered notices alternate")

with open(f"{work}/reader") as f:
    ok, bad = map(int, f.read().split())
print(f"\nReader: {ok} queries answered, {bad} failed")
check(bad == 0 and ok > 0, "the reader never failed")

samples = []
with open(f"{work}/rss") as f:
    for line in f:
        parts = line.split()
        if len(parts) == 4:
            samples.append((int(parts[0]), int(parts[1]) / 1024, int(parts[2]) / 1024,
                            int(parts[3]) / 2**20))
rss = [r for _, r, _, _ in samples]
third = max(1, len(rss) // 3)
middle, last = rss[third:2 * third], rss[-third:]
peak, final = max(h for _, _, h, _ in samples), rss[-1]
m_mid, m_last = statistics.median(middle), statistics.median(last)
allowed = max(5.0, 0.10 * m_mid)
print(f"\nMemory ({len(samples)} samples over {samples[-1][0]} s): peak (VmHWM) {peak:.1f} MiB, final (VmRSS) {final:.1f} MiB; "
      f"median RSS in the middle third {m_mid:.1f} MiB, in the last third {m_last:.1f} MiB "
      f"({m_last - m_mid:+.1f} MiB); the database file grew to {samples[-1][3]:.1f} MiB")
step = max(1, len(samples) // 12)
print("  t (s) / RSS (MiB) / database (MiB): " + ", ".join(
    f"{t}/{r:.0f}/{d:.0f}" for t, r, _, d in samples[::step]))
check(m_last - m_mid <= allowed, f"memory flat: the last third's median at most {allowed:.1f} MiB "
      "(10 %, at least 5 MiB) above the middle third's")

errors = collections.Counter()
with open(f"{work}/daemon.log") as f:
    for line in f:
        if " ERROR " in line:
            errors[re.sub(r"\d+", "N", line.split(" ERROR ", 1)[1])[:120]] += 1
print(f"\nDaemon exit status {daemon_exit}; ERROR lines in its log: {sum(errors.values())}")
for text, n in errors.most_common(8):
    print(f"  {n:5} {text.strip()}")
check(daemon_exit == 0, "the daemon stopped cleanly on SIGTERM")
check(not any("panicked" in l for l in open(f"{work}/daemon.log")), "no panic")

print("\nRESULT:", "PASS" if not failures else f"FAIL ({len(failures)})")
sys.exit(1 if failures else 0)
EOF
