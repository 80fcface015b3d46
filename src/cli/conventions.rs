//! What a command-line tool is expected to do beyond its own job: shell completions, a man
//! page, option values listed in `--help`, the name of whoever makes an audited change, and
//! which environment variables steer the log (`LOTDRIFT_LOG`, `RUST_LOG`, `NO_COLOR`).

use std::path::Path;

use clap::{CommandFactory, ValueEnum};

use super::{Cli, Failure, usage};

/// `--test` of `compare` (names as `stats::compare::TestKind` parses them).
#[derive(Debug, Clone, Copy, ValueEnum)]
pub(super) enum TestArg {
    /// Welch's t test (unequal variances)
    Welch,
    /// Student's pooled t test
    #[value(alias = "student")]
    Pooled,
    /// Mann–Whitney U (distribution-free)
    #[value(alias = "mann_whitney", alias = "wilcoxon-rank-sum")]
    MannWhitney,
    /// F test of the variance ratio
    F,
    /// Brown–Forsythe test of spread
    #[value(alias = "brown_forsythe")]
    BrownForsythe,
}

/// `--alternative` of `compare`.
#[derive(Debug, Clone, Copy, ValueEnum)]
pub(super) enum AlternativeArg {
    /// a − b differs from delta in either direction
    #[value(alias = "two_sided", alias = "twosided")]
    TwoSided,
    /// a − b is below delta
    Less,
    /// a − b is above delta
    Greater,
}

/// `--method` of `adjust`.
#[derive(Debug, Clone, Copy, ValueEnum)]
pub(super) enum MethodArg {
    /// family-wise error, single step
    Bonferroni,
    /// family-wise error, step-down
    Holm,
    /// family-wise error, step-up (independent tests)
    Hochberg,
    /// false discovery rate, Benjamini–Hochberg
    Bh,
    /// false discovery rate under any dependence, Benjamini–Yekutieli
    By,
}

/// The name a value was given on the command line as (its canonical spelling).
pub(super) fn name_of(v: impl ValueEnum) -> String {
    v.to_possible_value()
        .map(|p| p.get_name().to_string())
        .unwrap_or_default()
}

/// `lotdrift completions SHELL`: the completion script on standard output.
pub(super) fn completions(shell: clap_complete::Shell) {
    let mut cmd = Cli::command();
    clap_complete::generate(shell, &mut cmd, "lotdrift", &mut std::io::stdout());
}

/// `lotdrift man`: the main page on standard output, or with `--out DIR` one page per
/// command (`lotdrift.1`, `lotdrift-run.1`, ...) written into DIR.
pub(super) fn man(out: Option<&Path>) -> Result<(), Failure> {
    let cmd = Cli::command();
    match out {
        None => clap_mangen::Man::new(cmd)
            .render(&mut std::io::stdout())
            .or_else(ignore_closed_pipe)
            .map_err(|e| Failure::Runtime(anyhow::anyhow!("writing the man page: {e}"))),
        Some(dir) => {
            std::fs::create_dir_all(dir)
                .map_err(|e| usage(format!("--out: cannot create {}: {e}", dir.display())))?;
            clap_mangen::generate_to(cmd, dir).map_err(|e| {
                Failure::Runtime(anyhow::anyhow!(
                    "writing man pages to {}: {e}",
                    dir.display()
                ))
            })?;
            say!("man pages written to {}", dir.display());
            Ok(())
        }
    }
}

/// A reader that closed its end of the pipe (`lotdrift man | head`) is not a failure.
fn ignore_closed_pipe(e: std::io::Error) -> std::io::Result<()> {
    if e.kind() == std::io::ErrorKind::BrokenPipe {
        Ok(())
    } else {
        Err(e)
    }
}

/// Who makes an audited change: `--by NAME`, else the login name (`USER`, `USERNAME`), else
/// "unknown". A given name must not be blank.
pub(super) fn who(by: Option<&str>) -> Result<String, Failure> {
    match by {
        Some(name) if name.trim().is_empty() => Err(usage("--by must name a person")),
        Some(name) => Ok(name.trim().to_string()),
        None => Ok(std::env::var("USER")
            .or_else(|_| std::env::var("USERNAME"))
            .unwrap_or_else(|_| "unknown".into())),
    }
}

/// The log filter: `LOTDRIFT_LOG`, else `RUST_LOG` (both in `tracing`'s filter syntax, e.g.
/// `lotdrift=debug`), else `log.level` of the config for lotdrift and `warn` for libraries.
pub(super) fn log_filter(level: &str) -> tracing_subscriber::EnvFilter {
    use tracing_subscriber::EnvFilter;
    EnvFilter::try_from_env("LOTDRIFT_LOG")
        .or_else(|_| EnvFilter::try_from_env("RUST_LOG"))
        .unwrap_or_else(|_| EnvFilter::new(format!("lotdrift={level},warn")))
}

/// Colour on standard error only for a terminal, and never when `NO_COLOR` is set to
/// anything but the empty string (no-color.org).
pub(super) fn colour_on_stderr() -> bool {
    let no_color = std::env::var_os("NO_COLOR").is_some_and(|v| !v.is_empty());
    !no_color && std::io::IsTerminal::is_terminal(&std::io::stderr())
}
