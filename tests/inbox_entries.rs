//! Inbox entries that are not ordinary lot files, through `lotdrift run --once`: a symbolic
//! link and a named pipe are quarantined as entries (never followed or read), an empty file is
//! taken within the settle interval.

mod common;

use std::path::Path;
use std::process::{Command, Stdio};
use std::time::Duration;

use common::*;

/// `run --once` with a time limit (a read of a pipe would block forever); asserts exit 0.
fn once_within(site: &Site, limit: Duration) {
    let log = site.path().join("once.log");
    let mut child = cmd(site.path())
        .args(["run", "--once", "--config"])
        .arg(site.config())
        .stdout(Stdio::null())
        .stderr(std::fs::File::create(&log).unwrap())
        .spawn()
        .unwrap();
    let status = wait_exit(&mut child, limit);
    let log = std::fs::read_to_string(&log).unwrap_or_default();
    assert!(status.success(), "run --once failed ({status}): {log}");
}

fn good_lot(site: &Site, name: &str) {
    let values = lot_values(8, 10.0, 0.1, 1);
    let text = long_file("alder-cells", "AL-001", &lot_date(0), &[("mass_g", values)]);
    drop_file(&site.inbox(), name, &text);
}

/// The quarantined entry (not followed: `symlink_metadata`) and its reason.
fn quarantined(site: &Site, name: &str) -> (std::fs::Metadata, String) {
    let q = site.path().join("quarantine");
    let meta = std::fs::symlink_metadata(q.join(name)).unwrap_or_else(|e| {
        panic!(
            "{name} is not in quarantine ({e}): {:?}",
            site.files_in("quarantine")
        )
    });
    let reason = std::fs::read_to_string(q.join(format!("{name}.reason.txt"))).unwrap();
    (meta, reason)
}

fn assert_gone_from_inbox(site: &Site, name: &str) {
    let p = site.inbox().join(name);
    assert!(
        std::fs::symlink_metadata(&p).is_err(),
        "{} is still in the inbox",
        p.display()
    );
}

#[test]
fn a_symbolic_link_is_quarantined_not_followed() {
    let site = Site::new("[watch]\nsettle_seconds = 0.2\n");
    // A link to a good lot file outside the inbox: following it would store the lot.
    let target = site.path().join("outside.csv");
    let text = long_file(
        "alder-cells",
        "AL-009",
        &lot_date(8),
        &[("mass_g", lot_values(8, 10.0, 0.1, 9))],
    );
    std::fs::write(&target, text).unwrap();
    std::os::unix::fs::symlink(&target, site.inbox().join("linked.csv")).unwrap();
    good_lot(&site, "good.csv");
    once_within(&site, Duration::from_secs(60));
    let (meta, reason) = quarantined(&site, "linked.csv");
    assert!(meta.file_type().is_symlink(), "the link itself was moved");
    assert!(reason.contains("a symbolic link"), "{reason}");
    assert!(reason.contains("links are not followed"), "{reason}");
    assert!(target.is_file(), "the link's target is untouched");
    assert_gone_from_inbox(&site, "linked.csv");
    let status = site.status();
    assert_eq!(status["lots"], 1, "only the good file was stored: {status}");
    assert_eq!(status["quarantined"], 1, "{status}");
}

#[test]
fn a_named_pipe_is_quarantined_without_hanging() {
    use std::os::unix::fs::FileTypeExt;
    let site = Site::new("[watch]\nsettle_seconds = 0.2\n");
    let pipe = site.inbox().join("pipe.csv");
    let ok = Command::new("mkfifo").arg(&pipe).status().unwrap();
    assert!(ok.success(), "mkfifo failed");
    good_lot(&site, "good.csv");
    once_within(&site, Duration::from_secs(60));
    let (meta, reason) = quarantined(&site, "pipe.csv");
    assert!(meta.file_type().is_fifo());
    assert!(reason.contains("a named pipe"), "{reason}");
    assert_gone_from_inbox(&site, "pipe.csv");
    assert_eq!(site.status()["lots"], 1);
}

#[test]
fn a_folder_named_like_a_lot_file_stays_and_its_files_are_taken() {
    let site = Site::new("[watch]\nsettle_seconds = 0.2\n");
    let folder = site.inbox().join("x.csv");
    std::fs::create_dir(&folder).unwrap();
    good_lot(&site, "x.csv/inner.csv");
    once_within(&site, Duration::from_secs(60));
    assert!(Path::new(&folder).is_dir(), "the folder stays");
    assert_eq!(site.status()["lots"], 1);
    let log = std::fs::read_to_string(site.path().join("once.log")).unwrap();
    assert!(log.contains("a folder named like a lot file"), "{log}");
}

#[test]
fn run_once_takes_a_settled_empty_file() {
    let site = Site::new("[watch]\nsettle_seconds = 0.5\n");
    std::fs::File::create(site.inbox().join("empty.csv")).unwrap();
    good_lot(&site, "good.csv");
    // The daemon would wait 30 s for the empty file; --once takes it once settled.
    once_within(&site, Duration::from_secs(60));
    let (_, reason) = quarantined(&site, "empty.csv");
    assert!(reason.contains("empty file"), "{reason}");
    assert_gone_from_inbox(&site, "empty.csv");
    assert_eq!(site.status()["lots"], 1);
    assert!(
        site.files_in("inbox").is_empty(),
        "{:?}",
        site.files_in("inbox")
    );
}
