# Shared helpers of the benchmark scripts (sourced by benches/*.sh, not run alone).
#
# Binaries under test (environment):
#   LOTDRIFT_BIN=path     the lotdrift binary to measure ("A"); unset: build this checkout
#                         (cargo build --release --bins) and use target/release/lotdrift
#   LOTDRIFT_BIN_B=path   a second lotdrift binary ("B"): runs alternate A, B, A, B, ...
#                         and the summary prints both medians and the ratio B / A
#   WORKLOAD_BIN=path     the lot-file generator; default: lotdrift-workload beside
#                         LOTDRIFT_BIN when it is there, else the one this checkout builds
#
# After `resolve_binaries`: BIN_A, BIN_B (empty when not comparing), WORKLOAD,
# LABELS (A, or A B) and bin_of LABEL.

bench_name="${bench_name:-bench}"
say() { printf '[%s] %s\n' "$bench_name" "$*" >&2; }
die() { say "error: $*"; exit 1; }

repo="$(cd "$(dirname "${BASH_SOURCE[0]}")/.." && pwd)"
target_dir="${CARGO_TARGET_DIR:-$repo/target}"

# Median of numbers on stdin, one per line.
median() {
    sort -g | awk '{ v[NR] = $1 }
        END { if (NR == 0) exit 1
              if (NR % 2) print v[(NR + 1) / 2]; else printf "%.3f\n", (v[NR / 2] + v[NR / 2 + 1]) / 2 }'
}

# a / b with two decimals ("-" when b is 0 or either is empty).
ratio() {
    awk -v a="$1" -v b="$2" 'BEGIN { if (a == "" || b == "" || b + 0 == 0) print "-"; else printf "%.2f\n", a / b }'
}

# Wall clock in microseconds, without forking (bash 5's EPOCHREALTIME).
now_us() {
    local t="${EPOCHREALTIME/./}"
    printf '%s' "${t/,/}"
}

positive_int() {
    local name="$1"
    [[ "${!name}" =~ ^[1-9][0-9]*$ ]] || die "$name must be a positive integer (got '${!name}')"
}

# Absolute path of an executable file, or die naming the variable.
executable() {
    local name="$1" path="$2"
    [[ -f "$path" && -x "$path" ]] || die "$name=$path is not an executable file"
    printf '%s/%s' "$(cd "$(dirname "$path")" && pwd)" "$(basename "$path")"
}

resolve_binaries() {
    local built=0
    if [[ -n "${LOTDRIFT_BIN:-}" ]]; then
        BIN_A="$(executable LOTDRIFT_BIN "$LOTDRIFT_BIN")"
    else
        say "LOTDRIFT_BIN is not set: building this checkout (cargo build --release --bins)"
        (cd "$repo" && cargo build --release --bins) || die "cargo build failed"
        built=1
        BIN_A="$target_dir/release/lotdrift"
    fi
    BIN_B=""
    if [[ -n "${LOTDRIFT_BIN_B:-}" ]]; then
        BIN_B="$(executable LOTDRIFT_BIN_B "$LOTDRIFT_BIN_B")"
    fi
    if [[ -n "${WORKLOAD_BIN:-}" ]]; then
        WORKLOAD="$(executable WORKLOAD_BIN "$WORKLOAD_BIN")"
    elif [[ -x "$(dirname "$BIN_A")/lotdrift-workload" ]]; then
        WORKLOAD="$(dirname "$BIN_A")/lotdrift-workload"
    else
        if [[ "$built" != 1 ]]; then
            say "no lotdrift-workload beside $BIN_A: building it (cargo build --release --bin lotdrift-workload)"
            (cd "$repo" && cargo build --release --bin lotdrift-workload) || die "cargo build failed"
        fi
        WORKLOAD="$target_dir/release/lotdrift-workload"
    fi
    [[ -x "$WORKLOAD" ]] || die "no generator at $WORKLOAD"
    LABELS=(A)
    [[ -n "$BIN_B" ]] && LABELS+=(B)
    say "A = $BIN_A"
    [[ -n "$BIN_B" ]] && say "B = $BIN_B"
    say "generator = $WORKLOAD"
    return 0
}

bin_of() {
    case "$1" in
        A) printf '%s' "$BIN_A" ;;
        B) printf '%s' "$BIN_B" ;;
        *) die "unknown binary label $1" ;;
    esac
}

# A short content hash of a binary: cached databases are kept per binary.
bin_key() {
    sha256sum "$1" | cut -c1-12
}

# Sets `[monitor] silence = false` in a config written by `lotdrift init`: the generated lots
# are dated relative to a fixed start date, so every source would look silent to the clock.
quiet_silence() {
    local config="$1"
    if grep -q '^silence = ' "$config"; then
        sed -i 's/^silence = .*/silence = false/' "$config"
    else
        die "no 'silence = ' line in $config (lotdrift init changed?)"
    fi
}

# The machine's state, for the record (figures on a shared machine mean little without it).
machine_note() {
    printf 'machine: %s cores, load average %s\n' "$(nproc)" "$(cut -d' ' -f1-3 /proc/loadavg)"
}

# --- a private PostgreSQL server (POSTGRES=1) ----------------------------------
# Starts a throwaway cluster under $1 (initdb + pg_ctl from Debian's postgresql package, as
# `nobody` when run as root), listening on a free port of 127.0.0.1 with trust authentication.
# Sets PG_URL_BASE (postgres://postgres@127.0.0.1:PORT) and stops the server on EXIT.
start_postgres() {
    local dir="$1" bin port run=()
    bin="${LOTDRIFT_PG_BIN:-$(ls -d /usr/lib/postgresql/*/bin 2>/dev/null | sort -V | tail -n 1)}"
    [[ -x "$bin/initdb" ]] || die "no PostgreSQL server binaries (install Debian's postgresql)"
    mkdir -p "$dir"
    if [[ "$(id -u)" -eq 0 ]]; then
        chmod a+x "$(dirname "$dir")" # mktemp -d made it 0700: the server user must pass
        chown nobody: "$dir"
        run=(runuser -u nobody --)
    fi
    "${run[@]}" "$bin/initdb" -D "$dir/data" -U postgres --auth=trust -E UTF8 --locale=C \
        >"$dir/initdb.log" 2>&1 || die "initdb failed: see $dir/initdb.log"
    port=$(python3 -c 'import socket; s = socket.socket(); s.bind(("127.0.0.1", 0)); print(s.getsockname()[1])')
    # Durable commits, as a production server makes them (fsync on, the default).
    "${run[@]}" "$bin/pg_ctl" -D "$dir/data" -w -l "$dir/server.log" \
        -o "-p $port -k $dir -c listen_addresses=127.0.0.1" start >/dev/null \
        || die "the PostgreSQL server did not start: see $dir/server.log"
    PG_URL_BASE="postgres://postgres@127.0.0.1:$port"
    PG_STOP=("${run[@]}" "$bin/pg_ctl" -D "$dir/data" -m fast stop)
    PG_PSQL=("$bin/psql" -q -h 127.0.0.1 -p "$port" -U postgres)
    say "PostgreSQL $("$bin/postgres" --version | awk '{print $3}') on 127.0.0.1:$port"
}

stop_postgres() {
    [[ -n "${PG_STOP[*]:-}" ]] && "${PG_STOP[@]}" >/dev/null 2>&1 || true
}

# A fresh database NAME on the private server; prints its URL.
postgres_database() {
    "${PG_PSQL[@]}" -d postgres -c "CREATE DATABASE $1" >/dev/null || die "cannot create database $1"
    printf '%s/%s' "$PG_URL_BASE" "$1"
}
