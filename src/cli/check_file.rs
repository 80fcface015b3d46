//! `lotdrift check-file`: how a file would be read (its profile, lots, first values with
//! times in UTC) or every problem in it. Stores nothing.

use std::path::Path;

use anyhow::Context as _;

use super::Failure;
use crate::config::{Config, Profile};
use crate::intake::{self, check::FileCheck};

/// Reads `file` with the profile `name` (or the one the file would get in the inbox) and
/// prints the result; a refused file is exit 1.
pub(super) fn run(
    config: &Config,
    file: &Path,
    name: Option<&str>,
    json: bool,
) -> Result<(), Failure> {
    let profile = match name {
        Some(n) => Some(config.input.by_name(n).ok_or_else(|| {
            let known: Vec<&str> = config
                .input
                .profiles
                .iter()
                .map(|p| p.name.as_str())
                .collect();
            super::usage(format!(
                "--profile: no input profile named {n:?} in {} (profiles: {})",
                config.file.display(),
                if known.is_empty() {
                    "none".to_owned()
                } else {
                    known.join(", ")
                }
            ))
        })?),
        None => profile_for(config, file),
    };
    let bytes = std::fs::read(file).with_context(|| format!("reading {}", file.display()))?;
    let file_name = file
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_default();
    let check = intake::check::check(&file_name, &bytes, profile);
    if json {
        let v = serde_json::to_value(&check).context("check-file --json")?;
        super::print_json(&v);
    } else {
        print_text(&check);
    }
    if check.ok {
        Ok(())
    } else {
        Err(Failure::Runtime(anyhow::anyhow!(
            "{file_name} would be refused ({} problem(s))",
            check.problems.len() + check.more_problems
        )))
    }
}

/// The profile a file gets: by its name and, inside the inbox, its subfolder (paths compared
/// after resolving `.`, `..` and links, so `./site/inbox/cedar/x.csv` finds `folder = "cedar"`).
pub(super) fn profile_for<'c>(config: &'c Config, file: &Path) -> Option<&'c Profile> {
    let real = |p: &Path| std::fs::canonicalize(p).unwrap_or_else(|_| p.to_path_buf());
    config.input.choose(&real(&config.paths.inbox), &real(file))
}

fn print_text(c: &FileCheck) {
    let how = if c.profile == "built-in" {
        "with the built-in dialect (no input profile matched)".to_owned()
    } else {
        format!("with input profile {:?}", c.profile)
    };
    if !c.ok {
        print_refused(c, &how);
        return;
    }
    say!("{}: read {how}", c.file);
    say!(
        "would store {} lot(s), {} characteristic(s), {} value(s) from {} row(s) ({} layout)",
        c.lots.len(),
        c.characteristics.len(),
        c.values,
        c.rows,
        c.layout.unwrap_or("-")
    );
    say!("lots:");
    for l in &c.lots {
        let times = match (&l.first_sampled_at, &l.last_sampled_at) {
            (Some(a), Some(b)) if a == b => format!(", sampled {a}"),
            (Some(a), Some(b)) => format!(", sampled {a} to {b}"),
            _ => String::new(),
        };
        say!(
            "  {} / {}: {} ({} unit(s), {} value(s){times})",
            l.source,
            l.lot,
            l.characteristics.join(", "),
            l.units,
            l.values
        );
    }
    say!("first values (times in UTC):");
    say!("  source\tlot\tcharacteristic\tunit\tvalue\tsampled_at");
    for v in &c.first_values {
        say!(
            "  {}\t{}\t{}\t{}\t{}\t{}",
            v.source,
            v.lot,
            v.characteristic,
            v.unit.as_deref().unwrap_or("-"),
            v.value,
            v.sampled_at.as_deref().unwrap_or("-")
        );
    }
}

fn print_refused(c: &FileCheck, how: &str) {
    say!("{}: would be refused, read {how}:", c.file);
    for p in &c.problems {
        say!("  {}", p.text);
    }
    if c.more_problems > 0 {
        say!("  … and {} more problem(s)", c.more_problems);
    }
    if let Some(h) = &c.hint {
        say!("{h}");
    }
}
