//! `lotdrift-workload`: writes invented incoming-inspection lot files (CSV) for
//! lotdrift demos, tests and benchmarks.
//!
//! Every (source, lot) becomes one file (or a few, see `--split`) in the layout
//! of the lot-file contract: "long" (`source,characteristic,lot,value,sampled_at,unit`,
//! one row per unit and characteristic) or "wide" (`source,lot,sampled_at,unit`
//! followed by one column per characteristic, one row per unit).
//!
//! The model per source `s`, characteristic `c` and lot `l`:
//!
//! ```text
//! lot_mean = target_c + shift(s,c,l) * sd_c + N(0, between_lot_sd * sd_c)
//! value    = lot_mean + N(0, sd_c * spread(s,c,l))
//! ```
//!
//! where `shift` is the sum of every matching `--shift` whose start lot is
//! reached and `spread` the product of every matching `--spread-shift`.
//! Values depend only on the seed and the statistical parameters: layout,
//! splitting, comments and name shuffling never change a value.

use std::fs::{self, File};
use std::io::{BufWriter, Write};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicUsize, Ordering};
use std::time::Instant;

use anyhow::{Context, Result, bail, ensure};
use chrono::{Duration, NaiveDate, NaiveDateTime, NaiveTime};
use clap::{Parser, ValueEnum};
use rand::rngs::StdRng;
use rand::{Rng, SeedableRng};
use rand_distr::StandardNormal;

#[derive(Parser, Debug)]
#[command(
    name = "lotdrift-workload",
    version,
    about = "Write invented incoming-inspection lot files (CSV) for lotdrift demos, tests and benchmarks",
    after_help = "Example (the benchmark workload):\n  lotdrift-workload --out /tmp/wl --sources 200 --characteristics 3 --lots 200 --units 32 \\\n    --between-lot-sd 0.1 --shift '*:*:150:1.0' --shuffle-names"
)]
struct Cli {
    /// Directory to write the lot files into (created if missing).
    #[arg(long)]
    out: PathBuf,

    /// Number of sources, named source-001, source-002, ...
    #[arg(long, default_value_t = 3)]
    sources: usize,

    /// Explicit source names, comma separated (overrides --sources).
    #[arg(long, value_delimiter = ',')]
    source_names: Vec<String>,

    /// Number of characteristics, named char-001, char-002, ... (targets 10, 20, 30, ...).
    #[arg(long, default_value_t = 3)]
    characteristics: usize,

    /// Explicit characteristics, comma separated (overrides --characteristics).
    /// Each is NAME or NAME=MEAN:SD or NAME=MEAN:SD:DECIMALS.
    #[arg(long, value_delimiter = ',')]
    characteristic_names: Vec<String>,

    /// Lots per source.
    #[arg(long, default_value_t = 20)]
    lots: usize,

    /// Units (sampled parts) per lot.
    #[arg(long, default_value_t = 32)]
    units: usize,

    /// Unit (within-lot) standard deviation for characteristics that do not give their own.
    #[arg(long, default_value_t = 1.0)]
    unit_sd: f64,

    /// Between-lot standard deviation as a fraction of the unit sd:
    /// lot mean = target + N(0, F * sd).
    #[arg(long, default_value_t = 0.0, value_name = "F")]
    between_lot_sd: f64,

    /// Mean shift SOURCE:CHAR:FROM_LOT:SIZE (SIZE in unit sd, FROM_LOT 1-based,
    /// `*` matches any source or characteristic). Repeatable; matching shifts add up.
    #[arg(
        long,
        allow_hyphen_values = true,
        value_name = "SOURCE:CHAR:FROM_LOT:SIZE"
    )]
    shift: Vec<String>,

    /// Spread shift SOURCE:CHAR:FROM_LOT:FACTOR (multiplies the unit sd).
    /// Repeatable; matching factors multiply.
    #[arg(
        long,
        allow_hyphen_values = true,
        value_name = "SOURCE:CHAR:FROM_LOT:FACTOR"
    )]
    spread_shift: Vec<String>,

    /// Random seed (the same arguments and seed give byte-identical files).
    #[arg(long, default_value_t = 1)]
    seed: u64,

    /// File layout for all sources: long, wide, or mixed (long or wide chosen per lot).
    #[arg(long, value_enum, default_value_t = Layout::Long)]
    layout: Layout,

    /// Per-source layout override SOURCE=long|wide|mixed. Repeatable.
    #[arg(long, value_name = "SOURCE=LAYOUT")]
    source_layout: Vec<String>,

    /// Sampling date of lot 1 (YYYY-MM-DD).
    #[arg(long, default_value = "2026-01-05")]
    start_date: String,

    /// Days between consecutive lots of a source.
    #[arg(long, default_value_t = 1)]
    days_between_lots: u32,

    /// Random jitter of each lot's date, up to +/- this many days (dates never go backwards).
    #[arg(long, default_value_t = 0)]
    date_jitter_days: u32,

    /// Lot-code prefix per source, SOURCE=PREFIX (repeatable). The lot code is PREFIX
    /// followed by the zero-padded lot number; the default prefix is "L".
    #[arg(long, value_name = "SOURCE=PREFIX")]
    lot_prefix: Vec<String>,

    /// Write some characteristics of some lots into a second file (another inspection
    /// station): SOURCE:LOTS:CHARS:SUFFIX, LOTS is `*`, N, N-M or a `+` list of those,
    /// CHARS a `+` list of names. The file name gets `-SUFFIX`. Repeatable.
    #[arg(long, value_name = "SOURCE:LOTS:CHARS:SUFFIX")]
    split: Vec<String>,

    /// Start every N-th lot's files with a `#` comment line (0 = never).
    #[arg(long, default_value_t = 0, value_name = "N")]
    comment_every: usize,

    /// Prefix file names with a random token so that name order is not sampling order.
    #[arg(long)]
    shuffle_names: bool,

    /// Decimals for characteristics that do not give their own
    /// (default: about three digits below the unit sd's leading digit).
    #[arg(long)]
    decimals: Option<usize>,

    /// Writer threads (default: available cores).
    #[arg(long)]
    jobs: Option<usize>,
}

#[derive(Clone, Copy, Debug, PartialEq, Eq, ValueEnum)]
enum Layout {
    Long,
    Wide,
    Mixed,
}

impl Layout {
    fn parse(text: &str) -> Result<Self> {
        match text {
            "long" => Ok(Layout::Long),
            "wide" => Ok(Layout::Wide),
            "mixed" => Ok(Layout::Mixed),
            other => bail!("unknown layout {other:?} (expected long, wide or mixed)"),
        }
    }
}

#[derive(Debug)]
struct Characteristic {
    name: String,
    mean: f64,
    sd: f64,
    decimals: usize,
}

/// `None` matches everything (`*`), `Some(i)` one index.
type Selector = Option<usize>;

#[derive(Debug)]
struct Shift {
    source: Selector,
    characteristic: Selector,
    from_lot: usize,
    amount: f64,
}

impl Shift {
    fn applies(&self, source: usize, characteristic: usize, lot: usize) -> bool {
        self.source.is_none_or(|s| s == source)
            && self.characteristic.is_none_or(|c| c == characteristic)
            && lot >= self.from_lot
    }
}

#[derive(Debug)]
struct Split {
    source: Selector,
    /// Inclusive lot ranges; empty means every lot.
    lots: Vec<(usize, usize)>,
    characteristics: Vec<usize>,
    suffix: String,
}

impl Split {
    fn applies(&self, source: usize, lot: usize) -> bool {
        self.source.is_none_or(|s| s == source)
            && (self.lots.is_empty() || self.lots.iter().any(|&(a, b)| (a..=b).contains(&lot)))
    }
}

#[derive(Debug)]
struct Scenario {
    out: PathBuf,
    sources: Vec<String>,
    layouts: Vec<Layout>,
    prefixes: Vec<String>,
    characteristics: Vec<Characteristic>,
    lots: usize,
    units: usize,
    between_lot_sd: f64,
    shifts: Vec<Shift>,
    spread_shifts: Vec<Shift>,
    splits: Vec<Split>,
    start_date: NaiveDate,
    days_between_lots: u32,
    date_jitter_days: u32,
    comment_every: usize,
    shuffle_names: bool,
    seed: u64,
    lot_width: usize,
    unit_width: usize,
}

#[derive(Default, Clone, Copy)]
struct Counts {
    files: u64,
    values: u64,
}

fn main() -> std::process::ExitCode {
    let cli = Cli::parse();
    match run(&cli) {
        Ok(()) => std::process::ExitCode::SUCCESS,
        Err(error) => {
            eprintln!("lotdrift-workload: error: {error:#}");
            std::process::ExitCode::FAILURE
        }
    }
}

fn run(cli: &Cli) -> Result<()> {
    let started = Instant::now();
    let scenario = build_scenario(cli)?;
    fs::create_dir_all(&scenario.out)
        .with_context(|| format!("creating output directory {}", scenario.out.display()))?;

    let jobs = cli
        .jobs
        .unwrap_or_else(|| std::thread::available_parallelism().map_or(1, |n| n.get()))
        .clamp(1, scenario.sources.len().max(1));
    let next_source = AtomicUsize::new(0);
    let results: Vec<Result<Counts>> = std::thread::scope(|scope| {
        let handles: Vec<_> = (0..jobs)
            .map(|_| {
                scope.spawn(|| {
                    let mut total = Counts::default();
                    loop {
                        let source = next_source.fetch_add(1, Ordering::Relaxed);
                        if source >= scenario.sources.len() {
                            return Ok(total);
                        }
                        let counts = generate_source(&scenario, source)?;
                        total.files += counts.files;
                        total.values += counts.values;
                    }
                })
            })
            .collect();
        handles
            .into_iter()
            .map(|handle| {
                handle
                    .join()
                    .unwrap_or_else(|_| Err(anyhow::anyhow!("writer thread panicked")))
            })
            .collect()
    });
    let mut total = Counts::default();
    for result in results {
        let counts = result?;
        total.files += counts.files;
        total.values += counts.values;
    }
    println!(
        "lotdrift-workload: files={} values={} seconds={:.3} sources={} characteristics={} lots={} units={} out={}",
        total.files,
        total.values,
        started.elapsed().as_secs_f64(),
        scenario.sources.len(),
        scenario.characteristics.len(),
        scenario.lots,
        scenario.units,
        scenario.out.display()
    );
    Ok(())
}

/// Names go into CSV cells and file names unquoted, so keep them plain.
fn check_name(kind: &str, name: &str) -> Result<()> {
    ensure!(!name.is_empty(), "{kind} name must not be empty");
    ensure!(
        name.chars()
            .all(|c| c.is_alphanumeric() || "-_.".contains(c)),
        "{kind} name {name:?} may only contain letters, digits, '-', '_' and '.'"
    );
    ensure!(name != "*", "{kind} name must not be '*'");
    Ok(())
}

fn default_decimals(sd: f64) -> usize {
    // About three decimal digits below the leading digit of the sd: 15 -> 2, 1 -> 3, 0.2 -> 4.
    let digits = 3 - sd.log10().floor() as i64;
    digits.clamp(0, 9) as usize
}

fn parse_characteristic(
    spec: &str,
    default_sd: f64,
    default_decimals_override: Option<usize>,
    index: usize,
) -> Result<Characteristic> {
    let (name, params) = match spec.split_once('=') {
        Some((name, params)) => (name.trim(), Some(params)),
        None => (spec.trim(), None),
    };
    check_name("characteristic", name)?;
    let (mean, sd, decimals) = match params {
        None => (10.0 * (index + 1) as f64, default_sd, None),
        Some(params) => {
            let parts: Vec<&str> = params.split(':').collect();
            ensure!(
                parts.len() == 2 || parts.len() == 3,
                "characteristic {spec:?}: expected NAME=MEAN:SD or NAME=MEAN:SD:DECIMALS"
            );
            let mean: f64 = parts[0]
                .parse()
                .with_context(|| format!("characteristic {spec:?}: bad mean"))?;
            let sd: f64 = parts[1]
                .parse()
                .with_context(|| format!("characteristic {spec:?}: bad sd"))?;
            let decimals = match parts.get(2) {
                Some(d) => Some(
                    d.parse::<usize>()
                        .with_context(|| format!("characteristic {spec:?}: bad decimals"))?,
                ),
                None => None,
            };
            (mean, sd, decimals)
        }
    };
    ensure!(
        mean.is_finite() && sd.is_finite() && sd > 0.0,
        "characteristic {name}: mean must be finite and sd > 0"
    );
    let decimals = decimals
        .or(default_decimals_override)
        .unwrap_or_else(|| default_decimals(sd));
    ensure!(decimals <= 12, "characteristic {name}: at most 12 decimals");
    Ok(Characteristic {
        name: name.to_string(),
        mean,
        sd,
        decimals,
    })
}

fn resolve(kind: &str, names: &[String], text: &str, spec: &str) -> Result<Selector> {
    if text == "*" {
        return Ok(None);
    }
    match names.iter().position(|n| n == text) {
        Some(i) => Ok(Some(i)),
        None => bail!("{spec:?}: unknown {kind} {text:?}"),
    }
}

fn parse_lot_number(text: &str, lots: usize, spec: &str) -> Result<usize> {
    let lot: usize = text
        .trim()
        .parse()
        .with_context(|| format!("{spec:?}: bad lot number {text:?}"))?;
    ensure!(
        (1..=lots).contains(&lot),
        "{spec:?}: lot {lot} outside 1..={lots}"
    );
    Ok(lot)
}

fn parse_shift(
    spec: &str,
    sources: &[String],
    characteristics: &[String],
    lots: usize,
    is_factor: bool,
) -> Result<Shift> {
    let parts: Vec<&str> = spec.split(':').collect();
    ensure!(
        parts.len() == 4,
        "{spec:?}: expected SOURCE:CHAR:FROM_LOT:{}",
        if is_factor { "FACTOR" } else { "SIZE" }
    );
    let amount: f64 = parts[3]
        .trim()
        .parse()
        .with_context(|| format!("{spec:?}: bad number {:?}", parts[3]))?;
    ensure!(amount.is_finite(), "{spec:?}: amount must be finite");
    if is_factor {
        ensure!(amount > 0.0, "{spec:?}: spread factor must be > 0");
    }
    Ok(Shift {
        source: resolve("source", sources, parts[0].trim(), spec)?,
        characteristic: resolve("characteristic", characteristics, parts[1].trim(), spec)?,
        from_lot: parse_lot_number(parts[2], lots, spec)?,
        amount,
    })
}

fn parse_split(
    spec: &str,
    sources: &[String],
    characteristics: &[String],
    lots: usize,
) -> Result<Split> {
    let parts: Vec<&str> = spec.split(':').collect();
    ensure!(
        parts.len() == 4,
        "{spec:?}: expected SOURCE:LOTS:CHARS:SUFFIX"
    );
    let source = resolve("source", sources, parts[0].trim(), spec)?;
    let mut lot_ranges = Vec::new();
    if parts[1].trim() != "*" {
        for piece in parts[1].split('+') {
            let range = match piece.split_once('-') {
                Some((a, b)) => (
                    parse_lot_number(a, lots, spec)?,
                    parse_lot_number(b, lots, spec)?,
                ),
                None => {
                    let lot = parse_lot_number(piece, lots, spec)?;
                    (lot, lot)
                }
            };
            ensure!(range.0 <= range.1, "{spec:?}: empty lot range {piece:?}");
            lot_ranges.push(range);
        }
    }
    let mut chars = Vec::new();
    for name in parts[2].split('+') {
        match resolve("characteristic", characteristics, name.trim(), spec)? {
            Some(i) => chars.push(i),
            None => bail!("{spec:?}: name the characteristics of the split file explicitly"),
        }
    }
    let suffix = parts[3].trim().to_string();
    check_name("split suffix", &suffix)?;
    Ok(Split {
        source,
        lots: lot_ranges,
        characteristics: chars,
        suffix,
    })
}

fn parse_assignment<'a>(spec: &'a str, what: &str) -> Result<(&'a str, &'a str)> {
    spec.split_once('=')
        .map(|(a, b)| (a.trim(), b.trim()))
        .with_context(|| format!("{spec:?}: expected SOURCE={what}"))
}

fn build_scenario(cli: &Cli) -> Result<Scenario> {
    let sources: Vec<String> = if cli.source_names.is_empty() {
        (1..=cli.sources)
            .map(|i| format!("source-{i:03}"))
            .collect()
    } else {
        cli.source_names
            .iter()
            .map(|s| s.trim().to_string())
            .collect()
    };
    ensure!(!sources.is_empty(), "need at least one source");
    for (i, name) in sources.iter().enumerate() {
        check_name("source", name)?;
        ensure!(!sources[..i].contains(name), "source {name:?} given twice");
    }

    ensure!(
        cli.unit_sd.is_finite() && cli.unit_sd > 0.0,
        "--unit-sd must be > 0"
    );
    let specs: Vec<String> = if cli.characteristic_names.is_empty() {
        (1..=cli.characteristics)
            .map(|i| format!("char-{i:03}"))
            .collect()
    } else {
        cli.characteristic_names.clone()
    };
    ensure!(!specs.is_empty(), "need at least one characteristic");
    let characteristics = specs
        .iter()
        .enumerate()
        .map(|(i, spec)| parse_characteristic(spec, cli.unit_sd, cli.decimals, i))
        .collect::<Result<Vec<_>>>()?;
    let char_names: Vec<String> = characteristics.iter().map(|c| c.name.clone()).collect();
    for (i, name) in char_names.iter().enumerate() {
        ensure!(
            !char_names[..i].contains(name),
            "characteristic {name:?} given twice"
        );
        ensure!(
            ![
                "source",
                "lot",
                "sampled_at",
                "unit",
                "characteristic",
                "value"
            ]
            .contains(&name.as_str()),
            "characteristic name {name:?} clashes with a lot-file column"
        );
    }

    ensure!(cli.lots >= 1, "--lots must be at least 1");
    ensure!(cli.units >= 1, "--units must be at least 1");
    ensure!(
        cli.between_lot_sd.is_finite() && cli.between_lot_sd >= 0.0,
        "--between-lot-sd must be >= 0"
    );

    let shifts = cli
        .shift
        .iter()
        .map(|s| parse_shift(s, &sources, &char_names, cli.lots, false))
        .collect::<Result<Vec<_>>>()?;
    let spread_shifts = cli
        .spread_shift
        .iter()
        .map(|s| parse_shift(s, &sources, &char_names, cli.lots, true))
        .collect::<Result<Vec<_>>>()?;
    let splits = cli
        .split
        .iter()
        .map(|s| parse_split(s, &sources, &char_names, cli.lots))
        .collect::<Result<Vec<_>>>()?;

    let mut layouts = vec![cli.layout; sources.len()];
    for spec in &cli.source_layout {
        let (source, layout) = parse_assignment(spec, "LAYOUT")?;
        match resolve("source", &sources, source, spec)? {
            Some(i) => layouts[i] = Layout::parse(layout)?,
            None => layouts.fill(Layout::parse(layout)?),
        }
    }
    let mut prefixes = vec!["L".to_string(); sources.len()];
    for spec in &cli.lot_prefix {
        let (source, prefix) = parse_assignment(spec, "PREFIX")?;
        check_name("lot prefix", prefix)?;
        match resolve("source", &sources, source, spec)? {
            Some(i) => prefixes[i] = prefix.to_string(),
            None => prefixes.fill(prefix.to_string()),
        }
    }

    let start_date = NaiveDate::parse_from_str(&cli.start_date, "%Y-%m-%d")
        .with_context(|| format!("--start-date {:?}: expected YYYY-MM-DD", cli.start_date))?;

    Ok(Scenario {
        out: cli.out.clone(),
        sources,
        layouts,
        prefixes,
        characteristics,
        lots: cli.lots,
        units: cli.units,
        between_lot_sd: cli.between_lot_sd,
        shifts,
        spread_shifts,
        splits,
        start_date,
        days_between_lots: cli.days_between_lots,
        date_jitter_days: cli.date_jitter_days,
        comment_every: cli.comment_every,
        shuffle_names: cli.shuffle_names,
        seed: cli.seed,
        lot_width: cli.lots.to_string().len().max(3),
        unit_width: cli.units.to_string().len().max(3),
    })
}

/// SplitMix64 step, to derive independent per-source seeds from one seed.
fn mix(mut z: u64) -> u64 {
    z = z.wrapping_add(0x9E37_79B9_7F4A_7C15);
    z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
    z ^ (z >> 31)
}

/// One file's worth of a lot: which characteristics and the file-name suffix.
struct FileGroup {
    suffix: Option<String>,
    characteristics: Vec<usize>,
}

fn file_groups(scenario: &Scenario, source: usize, lot: usize) -> Vec<FileGroup> {
    let mut taken = vec![false; scenario.characteristics.len()];
    let mut groups = Vec::new();
    for split in scenario.splits.iter().filter(|s| s.applies(source, lot)) {
        let chars: Vec<usize> = split
            .characteristics
            .iter()
            .copied()
            .filter(|&c| !std::mem::replace(&mut taken[c], true))
            .collect();
        if !chars.is_empty() {
            groups.push(FileGroup {
                suffix: Some(split.suffix.clone()),
                characteristics: chars,
            });
        }
    }
    let rest: Vec<usize> = (0..taken.len()).filter(|&c| !taken[c]).collect();
    if !rest.is_empty() {
        // The main file comes first so that an unsplit lot looks the same.
        groups.insert(
            0,
            FileGroup {
                suffix: None,
                characteristics: rest,
            },
        );
    }
    groups
}

fn generate_source(scenario: &Scenario, source: usize) -> Result<Counts> {
    let source_seed = mix(scenario.seed ^ mix(source as u64 + 1));
    // Values come from one stream; layout choice, dates and names from another, so
    // that changing those never changes a value.
    let mut values_rng = StdRng::seed_from_u64(source_seed);
    let mut aux_rng = StdRng::seed_from_u64(mix(source_seed));
    let source_name = &scenario.sources[source];
    let n_chars = scenario.characteristics.len();
    let mut counts = Counts::default();
    let mut values = vec![0.0f64; scenario.units * n_chars];
    let mut stamps: Vec<String> = Vec::with_capacity(scenario.units);
    let mut serials: Vec<String> = Vec::with_capacity(scenario.units);
    let mut previous_date = scenario.start_date;

    for lot in 1..=scenario.lots {
        // Values: unit-major, values[u * n_chars + c].
        for (c, ch) in scenario.characteristics.iter().enumerate() {
            let shift: f64 = scenario
                .shifts
                .iter()
                .filter(|s| s.applies(source, c, lot))
                .map(|s| s.amount)
                .sum();
            let spread: f64 = scenario
                .spread_shifts
                .iter()
                .filter(|s| s.applies(source, c, lot))
                .map(|s| s.amount)
                .product();
            let lot_noise: f64 = values_rng.sample(StandardNormal);
            let lot_mean = ch.mean + shift * ch.sd + lot_noise * scenario.between_lot_sd * ch.sd;
            let unit_sd = ch.sd * spread;
            for u in 0..scenario.units {
                let z: f64 = values_rng.sample(StandardNormal);
                values[u * n_chars + c] = lot_mean + z * unit_sd;
            }
        }

        let layout = match scenario.layouts[source] {
            Layout::Mixed => {
                if aux_rng.random_bool(0.5) {
                    Layout::Long
                } else {
                    Layout::Wide
                }
            }
            fixed => fixed,
        };
        let nominal = scenario.start_date
            + Duration::days((lot as i64 - 1) * i64::from(scenario.days_between_lots));
        let jitter = i64::from(scenario.date_jitter_days);
        let date = if jitter > 0 {
            nominal + Duration::days(aux_rng.random_range(-jitter..=jitter))
        } else {
            nominal
        };
        let date = date.max(previous_date);
        previous_date = date;

        let lot_code = format!(
            "{}{:0width$}",
            scenario.prefixes[source],
            lot,
            width = scenario.lot_width
        );
        // Units are inspected one after another from 08:00, roughly two minutes apart.
        let start_of_day =
            NaiveDateTime::new(date, NaiveTime::from_hms_opt(8, 0, 0).unwrap_or_default());
        stamps.clear();
        serials.clear();
        let mut at = start_of_day;
        for u in 1..=scenario.units {
            stamps.push(at.format("%Y-%m-%dT%H:%M:%SZ").to_string());
            at += Duration::seconds(aux_rng.random_range(90..=150));
            serials.push(format!(
                "{lot_code}-{u:0width$}",
                width = scenario.unit_width
            ));
        }

        for group in file_groups(scenario, source, lot) {
            let token = if scenario.shuffle_names {
                format!("{:08x}_", aux_rng.random::<u32>())
            } else {
                String::new()
            };
            let suffix = group
                .suffix
                .as_ref()
                .map(|s| format!("-{s}"))
                .unwrap_or_default();
            let file_name = format!("{token}{source_name}_{lot_code}{suffix}.csv");
            let lot_file = LotFile {
                source: source_name,
                lot: &lot_code,
                lot_number: lot,
                date,
                stamps: &stamps,
                serials: &serials,
                values: &values,
                characteristics: &scenario.characteristics,
                group: &group.characteristics,
                comment: scenario.comment_every > 0 && lot % scenario.comment_every == 0,
            };
            write_atomically(&scenario.out, &file_name, |w| match layout {
                Layout::Wide => lot_file.write_wide(w),
                _ => lot_file.write_long(w),
            })?;
            counts.files += 1;
            counts.values += (scenario.units * group.characteristics.len()) as u64;
        }
    }
    Ok(counts)
}

struct LotFile<'a> {
    source: &'a str,
    lot: &'a str,
    lot_number: usize,
    date: NaiveDate,
    stamps: &'a [String],
    serials: &'a [String],
    /// Unit-major values of all characteristics.
    values: &'a [f64],
    characteristics: &'a [Characteristic],
    /// The characteristics that go into this file.
    group: &'a [usize],
    comment: bool,
}

impl LotFile<'_> {
    fn write_comment(&self, w: &mut impl Write) -> std::io::Result<()> {
        if self.comment {
            writeln!(
                w,
                "# incoming inspection, {} lot {} (#{}), sampled {} -- invented data from lotdrift-workload",
                self.source, self.lot, self.lot_number, self.date
            )?;
        }
        Ok(())
    }

    fn write_long(&self, w: &mut impl Write) -> std::io::Result<()> {
        self.write_comment(w)?;
        w.write_all(b"source,characteristic,lot,value,sampled_at,unit\n")?;
        let n_chars = self.characteristics.len();
        for (u, (stamp, serial)) in self.stamps.iter().zip(self.serials).enumerate() {
            for &c in self.group {
                let ch = &self.characteristics[c];
                writeln!(
                    w,
                    "{},{},{},{:.*},{},{}",
                    self.source,
                    ch.name,
                    self.lot,
                    ch.decimals,
                    self.values[u * n_chars + c],
                    stamp,
                    serial
                )?;
            }
        }
        Ok(())
    }

    fn write_wide(&self, w: &mut impl Write) -> std::io::Result<()> {
        self.write_comment(w)?;
        w.write_all(b"source,lot,sampled_at,unit")?;
        for &c in self.group {
            write!(w, ",{}", self.characteristics[c].name)?;
        }
        w.write_all(b"\n")?;
        let n_chars = self.characteristics.len();
        for (u, (stamp, serial)) in self.stamps.iter().zip(self.serials).enumerate() {
            write!(w, "{},{},{},{}", self.source, self.lot, stamp, serial)?;
            for &c in self.group {
                let ch = &self.characteristics[c];
                write!(w, ",{:.*}", ch.decimals, self.values[u * n_chars + c])?;
            }
            w.write_all(b"\n")?;
        }
        Ok(())
    }
}

/// Writes `dir/name.tmp`, then renames it to `dir/name`, so a watcher never sees a
/// half-written lot file.
fn write_atomically(
    dir: &Path,
    name: &str,
    body: impl FnOnce(&mut BufWriter<File>) -> std::io::Result<()>,
) -> Result<()> {
    let final_path = dir.join(name);
    let tmp_path = dir.join(format!("{name}.tmp"));
    let file =
        File::create(&tmp_path).with_context(|| format!("creating {}", tmp_path.display()))?;
    let mut writer = BufWriter::with_capacity(64 * 1024, file);
    body(&mut writer)
        .and_then(|()| writer.flush())
        .with_context(|| format!("writing {}", tmp_path.display()))?;
    drop(writer);
    fs::rename(&tmp_path, &final_path).with_context(|| {
        format!(
            "renaming {} to {}",
            tmp_path.display(),
            final_path.display()
        )
    })?;
    Ok(())
}
