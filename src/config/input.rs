//! `[[input.profile]]`: how one station's or supplier's files look (delimiter, decimal mark,
//! encoding, time zone, column names, workbook sheet), validated into [`Profile`] values.
//!
//! This module only reads and checks the settings; reading files with them is `intake`.

use std::collections::BTreeMap;
use std::fmt;
use std::path::Path;

use chrono::{DateTime, LocalResult, NaiveDateTime, TimeZone, Utc};
use serde::Deserialize;

use super::Problems;

/// `[input]` as written.
#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawInput {
    #[serde(default)]
    pub profile: Vec<RawProfile>,
}

/// One `[[input.profile]]` as written.
#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawProfile {
    pub name: Option<String>,
    #[serde(rename = "match")]
    pub pattern: Option<String>,
    pub folder: Option<String>,
    pub delimiter: Option<String>,
    pub decimal: Option<String>,
    pub encoding: Option<String>,
    pub timezone: Option<String>,
    pub date_format: Option<String>,
    pub header_row: Option<i64>,
    pub sheet: Option<String>,
    pub source: Option<String>,
    pub ignore: Option<Vec<String>>,
    #[serde(default)]
    pub columns: BTreeMap<String, String>,
    #[serde(default)]
    pub characteristics: BTreeMap<String, String>,
}

/// The validated profiles, in the order of the config file (the first match wins).
#[derive(Debug, Clone, Default)]
pub struct Input {
    pub profiles: Vec<Profile>,
}

/// Our column names, the keys of `[input.profile.columns]`.
pub const OUR_COLUMNS: [&str; 6] = [
    "source",
    "lot",
    "characteristic",
    "value",
    "unit",
    "sampled_at",
];

/// How to read the files of one station.
#[derive(Clone)]
pub struct Profile {
    pub name: String,
    /// Glob on the file name (case-insensitive).
    pub pattern: Option<glob::Pattern>,
    /// Inbox subfolder: files in `inbox/<folder>/...` get this profile.
    pub folder: Option<String>,
    pub delimiter: Delimiter,
    /// `b'.'` or `b','`.
    pub decimal: u8,
    pub encoding: Encoding,
    pub zone: Zone,
    /// strftime format tried after RFC 3339 and `YYYY-MM-DD HH:MM[:SS]`.
    pub date_format: Option<String>,
    /// 1-based line (text) or row (workbook) of the header; `None`: the first non-blank row.
    pub header_row: Option<usize>,
    /// Workbooks: the sheet to read (default: the first).
    pub sheet: Option<String>,
    /// A fixed source for every row (a source column, if any, is then ignored).
    pub source: Option<String>,
    /// Their column headers that are skipped (operator, comment...).
    pub ignore: Vec<String>,
    /// Our column name → their header.
    pub columns: BTreeMap<String, String>,
    /// Their header (or characteristic name) → our characteristic name.
    pub characteristics: BTreeMap<String, String>,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Delimiter {
    Byte(u8),
    /// The most frequent of `,` `;` tab `|` in the header line.
    Auto,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Encoding {
    /// A byte-order mark (UTF-8, UTF-16LE, UTF-16BE) if present, else UTF-16 when the first
    /// characters are ASCII with zero bytes between them, else UTF-8.
    Auto,
    Fixed(&'static encoding_rs::Encoding),
}

/// The zone of date-times written without an offset.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Zone {
    Named(chrono_tz::Tz),
    /// The machine's zone (`TZ`, else `/etc/localtime`).
    Machine,
}

impl Zone {
    /// The UTC instant of a local time: `Ambiguous` in the repeated hour when the clock goes
    /// back, `None` in the hour skipped when it goes forward.
    pub fn to_utc(self, local: &NaiveDateTime) -> LocalResult<DateTime<Utc>> {
        match self {
            Zone::Named(tz) => tz.from_local_datetime(local).map(|t| t.with_timezone(&Utc)),
            Zone::Machine => chrono::Local
                .from_local_datetime(local)
                .map(|t| t.with_timezone(&Utc)),
        }
    }
}

impl fmt::Display for Zone {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Zone::Named(tz) => f.write_str(tz.name()),
            Zone::Machine => f.write_str("the machine's time zone"),
        }
    }
}

/// Readable in `check-config`: the settings as written, not the glob's tokens.
impl fmt::Debug for Profile {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let delimiter = match self.delimiter {
            Delimiter::Byte(b) => char::from(b).escape_default().to_string(),
            Delimiter::Auto => "auto".to_owned(),
        };
        let encoding = match self.encoding {
            Encoding::Auto => "auto",
            Encoding::Fixed(e) => e.name(),
        };
        f.debug_struct("Profile")
            .field("name", &self.name)
            .field("match", &self.pattern.as_ref().map(glob::Pattern::as_str))
            .field("folder", &self.folder)
            .field("delimiter", &delimiter)
            .field("decimal", &char::from(self.decimal))
            .field("encoding", &encoding)
            .field("timezone", &self.zone.to_string())
            .field("date_format", &self.date_format)
            .field("header_row", &self.header_row)
            .field("sheet", &self.sheet)
            .field("source", &self.source)
            .field("ignore", &self.ignore)
            .field("columns", &self.columns)
            .field("characteristics", &self.characteristics)
            .finish()
    }
}

impl Profile {
    /// The profile of files that no profile matches: our own column names, any delimiter
    /// the built-in dialect has (`,`), UTF-8, the first sheet.
    pub fn builtin() -> Profile {
        Profile {
            name: "built-in".to_owned(),
            pattern: None,
            folder: None,
            delimiter: Delimiter::Byte(b','),
            decimal: b'.',
            encoding: Encoding::Auto,
            zone: Zone::Machine,
            date_format: None,
            header_row: None,
            sheet: None,
            source: None,
            ignore: Vec::new(),
            columns: BTreeMap::new(),
            characteristics: BTreeMap::new(),
        }
    }

    /// True when this profile applies to a file. `match` is tried on the file name, or, when
    /// it has a `/`, on `relative` (the path below the inbox, `/`-separated); `folder` is the
    /// first folder of that path, if the file lies in one.
    pub fn applies(&self, file_name: &str, relative: &str, folder: Option<&str>) -> bool {
        let options = glob::MatchOptions {
            case_sensitive: false,
            require_literal_separator: true,
            require_literal_leading_dot: false,
        };
        let by_name = self.pattern.as_ref().is_none_or(|p| {
            let subject = if p.as_str().contains('/') {
                relative
            } else {
                file_name
            };
            p.matches_with(subject, options)
        });
        let by_folder = self.folder.as_deref().is_none_or(|f| folder == Some(f));
        by_name && by_folder
    }
}

impl Input {
    /// The first profile that applies to `path` (a file in `inbox` or anywhere else).
    pub fn choose(&self, inbox: &Path, path: &Path) -> Option<&Profile> {
        let name = path.file_name()?.to_string_lossy();
        let parts: Vec<String> = match path.strip_prefix(inbox) {
            Ok(rel) => rel
                .components()
                .map(|c| c.as_os_str().to_string_lossy().into_owned())
                .collect(),
            Err(_) => vec![name.to_string()],
        };
        let folder = (parts.len() > 1).then(|| parts[0].as_str());
        let relative = parts.join("/");
        self.profiles
            .iter()
            .find(|p| p.applies(&name, &relative, folder))
    }

    pub fn by_name(&self, name: &str) -> Option<&Profile> {
        self.profiles.iter().find(|p| p.name == name)
    }
}

/// Validates every profile; problems name `input.profile[NAME].key`.
pub(super) fn validate_input(p: &mut Problems, raw: RawInput) -> Input {
    let mut profiles: Vec<Profile> = Vec::new();
    for (i, r) in raw.profile.into_iter().enumerate() {
        let label = match r.name.as_deref() {
            Some(n) if !n.trim().is_empty() => n.to_owned(),
            _ => (i + 1).to_string(),
        };
        let key = |k: &str| format!("input.profile[{label}].{k}");
        let profile = validate_profile(p, &key, r, &label);
        if profiles.iter().any(|q| q.name == profile.name) {
            p.push(
                &key("name"),
                "is used by an earlier profile; names must differ",
            );
        }
        profiles.push(profile);
    }
    Input { profiles }
}

fn validate_profile(
    p: &mut Problems,
    key: &dyn Fn(&str) -> String,
    r: RawProfile,
    label: &str,
) -> Profile {
    let name = r.name.clone().unwrap_or_default();
    if name.trim().is_empty() || name.chars().any(char::is_control) {
        p.push(
            &key("name"),
            "is required (a name without control characters)",
        );
    }
    let (pattern, folder) = validate_choice(p, key, &r);
    let (delimiter, decimal) = validate_numbers(p, key, &r);
    let profile = Profile {
        name: if name.trim().is_empty() {
            label.to_owned()
        } else {
            name
        },
        pattern,
        folder,
        delimiter,
        decimal,
        encoding: validate_encoding(p, key, r.encoding.as_deref()),
        zone: validate_zone(p, key, r.timezone.as_deref()),
        date_format: validate_date_format(p, key, r.date_format),
        header_row: r.header_row.and_then(|n| match usize::try_from(n) {
            Ok(n) if n >= 1 => Some(n),
            _ => {
                p.push(
                    &key("header_row"),
                    format!("must be a row number ≥ 1 (got {n})"),
                );
                None
            }
        }),
        sheet: r.sheet,
        source: r.source,
        ignore: r.ignore.unwrap_or_default(),
        columns: r.columns,
        characteristics: r.characteristics,
    };
    check_names(p, key, &profile);
    profile
}

/// `match` and `folder`: at least one, a valid glob, one folder name.
fn validate_choice(
    p: &mut Problems,
    key: &dyn Fn(&str) -> String,
    r: &RawProfile,
) -> (Option<glob::Pattern>, Option<String>) {
    let pattern = r
        .pattern
        .as_deref()
        .and_then(|g| match glob::Pattern::new(g) {
            Ok(pat) => Some(pat),
            Err(e) => {
                p.push(
                    &key("match"),
                    format!("{g:?} is not a glob pattern: {}", e.msg),
                );
                None
            }
        });
    let folder = r.folder.clone();
    if let Some(f) = &folder
        && (f.is_empty() || f.contains(['/', '\\']) || f == "." || f == "..")
    {
        p.push(
            &key("folder"),
            format!("{f:?} must be the name of one folder directly in the inbox"),
        );
    }
    if r.pattern.is_none() && folder.is_none() {
        p.push(
            &key("match"),
            "a profile needs match = \"GLOB\" (file name) or folder = \"NAME\" (inbox subfolder)",
        );
    }
    (pattern, folder)
}

/// `delimiter` and `decimal`, which must differ.
fn validate_numbers(
    p: &mut Problems,
    key: &dyn Fn(&str) -> String,
    r: &RawProfile,
) -> (Delimiter, u8) {
    let delimiter = validate_delimiter(p, key, r.delimiter.as_deref());
    let decimal = match r.decimal.as_deref() {
        None | Some(".") => b'.',
        Some(",") => b',',
        Some(d) => {
            p.push(&key("decimal"), format!("{d:?} must be \".\" or \",\""));
            b'.'
        }
    };
    if decimal == b',' && delimiter == Delimiter::Byte(b',') {
        p.push(
            &key("decimal"),
            "\",\" needs another delimiter (delimiter = \";\", \"\\t\" or \"auto\")",
        );
    }
    (delimiter, decimal)
}

fn validate_delimiter(
    p: &mut Problems,
    key: &dyn Fn(&str) -> String,
    d: Option<&str>,
) -> Delimiter {
    match d {
        None | Some(",") => Delimiter::Byte(b','),
        Some(";") => Delimiter::Byte(b';'),
        Some("\t") | Some("\\t") | Some("tab") => Delimiter::Byte(b'\t'),
        Some("|") => Delimiter::Byte(b'|'),
        Some("auto") => Delimiter::Auto,
        Some(other) => {
            p.push(
                &key("delimiter"),
                format!("{other:?} must be \",\", \";\", \"\\t\", \"|\" or \"auto\""),
            );
            Delimiter::Byte(b',')
        }
    }
}

fn validate_encoding(p: &mut Problems, key: &dyn Fn(&str) -> String, e: Option<&str>) -> Encoding {
    match e {
        None => Encoding::Auto,
        Some(label) if label.eq_ignore_ascii_case("auto") => Encoding::Auto,
        Some(label) => match encoding_by_label(label) {
            Some(enc) => Encoding::Fixed(enc),
            None => {
                p.push(
                    &key("encoding"),
                    format!(
                        "unknown encoding {label:?} (\"auto\", \"utf-8\", \"utf-16le\", \
                         \"utf-16be\", \"windows-1252\", \"iso-8859-15\", ...)"
                    ),
                );
                Encoding::Auto
            }
        },
    }
}

/// A WHATWG encoding label, also written with `_` for `-` or without the `-` (`latin-1`,
/// `utf_16le`, `cp-1252`).
fn encoding_by_label(label: &str) -> Option<&'static encoding_rs::Encoding> {
    let dashed = label.replace('_', "-");
    [label.to_owned(), dashed.clone(), dashed.replace('-', "")]
        .iter()
        .find_map(|l| encoding_rs::Encoding::for_label(l.as_bytes()))
}

fn validate_zone(p: &mut Problems, key: &dyn Fn(&str) -> String, z: Option<&str>) -> Zone {
    match z {
        None => Zone::Machine,
        Some(name) => match name.parse::<chrono_tz::Tz>() {
            Ok(tz) => Zone::Named(tz),
            Err(_) => {
                p.push(
                    &key("timezone"),
                    format!("{name:?} is not an IANA time zone name (such as \"Europe/Berlin\")"),
                );
                Zone::Machine
            }
        },
    }
}

fn validate_date_format(
    p: &mut Problems,
    key: &dyn Fn(&str) -> String,
    f: Option<String>,
) -> Option<String> {
    let f = f?;
    let bad = chrono::format::StrftimeItems::new(&f)
        .any(|item| matches!(item, chrono::format::Item::Error));
    let has_date = ["%d", "%e", "%F", "%D", "%x", "%j"]
        .iter()
        .any(|d| f.contains(d));
    if bad || f.trim().is_empty() || !has_date {
        p.push(
            &key("date_format"),
            format!("{f:?} is not a strftime format with a date (such as \"%d.%m.%Y %H:%M\")"),
        );
        return None;
    }
    Some(f)
}

fn check_names(p: &mut Problems, key: &dyn Fn(&str) -> String, profile: &Profile) {
    for (ours, theirs) in &profile.columns {
        if !OUR_COLUMNS.contains(&ours.as_str()) {
            p.push(
                &key(&format!("columns.{ours}")),
                format!(
                    "unknown column; the keys are our names: {}",
                    OUR_COLUMNS.join(", ")
                ),
            );
        }
        if theirs.trim().is_empty() {
            p.push(
                &key(&format!("columns.{ours}")),
                "must name a column header",
            );
        }
    }
    if profile.source.is_some() && profile.columns.contains_key("source") {
        p.push(
            &key("source"),
            "set either source (a fixed source) or columns.source (the source column), not both",
        );
    }
    let bad = |s: &str| s.trim().is_empty() || s.chars().any(char::is_control);
    if profile.source.as_deref().is_some_and(bad) {
        p.push(&key("source"), "must be a non-empty name");
    }
    for (theirs, ours) in &profile.characteristics {
        if bad(theirs) || bad(ours) {
            p.push(
                &key(&format!("characteristics.{theirs:?}")),
                "needs a non-empty column header and characteristic name",
            );
        }
    }
}

#[cfg(test)]
mod tests {
    use std::path::Path;

    use super::super::{Config, STARTER};
    use super::*;

    /// The starter file's commented profile, uncommented.
    fn uncommented_profile() -> String {
        let start = STARTER
            .find("# [[input.profile]]")
            .expect("a commented profile");
        let mut text = String::new();
        for line in STARTER[start..].lines() {
            text.push_str(line.strip_prefix("# ").unwrap_or(line));
            text.push('\n');
        }
        text
    }

    #[test]
    fn the_commented_profile_is_valid_when_uncommented() {
        let text = format!(
            "{}\n{}",
            &STARTER[..STARTER.find("# [[input").unwrap()],
            uncommented_profile()
        );
        let c = Config::from_toml(Path::new("/etc/lotdrift/lotdrift.toml"), &text).unwrap();
        let p = &c.input.profiles[0];
        assert_eq!(p.delimiter, Delimiter::Byte(b';'));
        assert_eq!(p.decimal, b',');
        assert_eq!(p.zone, Zone::Named(chrono_tz::Europe::Berlin));
        assert_eq!(p.header_row, Some(3));
        assert_eq!(p.columns["lot"], "Batch No.");
        assert_eq!(p.characteristics["Capacity [mAh]"], "capacity_mah");
        let inbox = Path::new("/in");
        assert!(
            c.input
                .choose(inbox, Path::new("/in/BIRCHWORKS_7.csv"))
                .is_some()
        );
        assert!(
            c.input
                .choose(inbox, Path::new("/in/sub/birchworks_7.csv"))
                .is_some()
        );
        assert!(
            c.input
                .choose(inbox, Path::new("/in/alder_7.csv"))
                .is_none()
        );
    }

    #[test]
    fn folder_profiles_match_the_first_folder_below_the_inbox() {
        let text = "[[input.profile]]\nname = \"a\"\nfolder = \"cedar\"\n\
                    [[input.profile]]\nname = \"b\"\nmatch = \"*.csv\"\n";
        let c = Config::from_toml(Path::new("/x/lotdrift.toml"), text).unwrap();
        let inbox = Path::new("/x/inbox");
        let name = |p: &str| c.input.choose(inbox, Path::new(p)).map(|p| p.name.clone());
        assert_eq!(name("/x/inbox/cedar/2026/f.csv").as_deref(), Some("a"));
        assert_eq!(name("/x/inbox/cedar.csv").as_deref(), Some("b"));
        assert_eq!(name("/x/inbox/other/f.txt"), None);
        // A pattern with a '/' is matched on the path below the inbox.
        let text = "[[input.profile]]\nname = \"deep\"\nmatch = \"lab*/*.TXT\"\n";
        let c = Config::from_toml(Path::new("/x/lotdrift.toml"), text).unwrap();
        assert!(
            c.input
                .choose(inbox, Path::new("/x/inbox/lab2/f.txt"))
                .is_some()
        );
        assert!(c.input.choose(inbox, Path::new("/x/inbox/f.txt")).is_none());
        assert!(
            c.input
                .choose(inbox, Path::new("/x/inbox/lab2/sub/f.txt"))
                .is_none()
        );
        // Outside the inbox only the name counts.
        assert_eq!(name("/tmp/cedar/f.txt"), None);
    }

    #[test]
    fn encoding_labels_are_read_leniently() {
        for (label, want) in [
            ("windows-1252", "windows-1252"),
            ("latin-1", "windows-1252"),
            ("cp1252", "windows-1252"),
            ("UTF_16LE", "UTF-16LE"),
            ("utf-16", "UTF-16LE"),
            ("iso-8859-15", "ISO-8859-15"),
        ] {
            assert_eq!(
                encoding_by_label(label).map(|e| e.name()),
                Some(want),
                "{label}"
            );
        }
        assert!(encoding_by_label("klingon").is_none());
    }

    #[test]
    fn bad_profiles_name_their_keys() {
        let text = "[[input.profile]]\nname = \"x\"\nmatch = \"[\"\ndecimal = \",\"\n\
                    [[input.profile]]\nname = \"x\"\nfolder = \"a/b\"\nsource = \"s\"\n\
                    [input.profile.columns]\nsource = \"Supplier\"\n";
        let err = Config::from_toml(Path::new("/x/lotdrift.toml"), text)
            .unwrap_err()
            .to_string();
        for want in [
            "input.profile[x].match: \"[\" is not a glob pattern",
            "input.profile[x].decimal: \",\" needs another delimiter",
            "input.profile[x].folder: \"a/b\" must be the name of one folder",
            "input.profile[x].source: set either source",
            "input.profile[x].name: is used by an earlier profile",
        ] {
            assert!(err.contains(want), "{want} missing in {err}");
        }
    }
}
