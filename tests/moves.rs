//! Moves into archive/ and quarantine/ on another file system: `lotdrift run --once` with the
//! folder on a tmpfs mounted for the test (needs root; skipped with a message otherwise).

mod common;

use std::path::{Path, PathBuf};
use std::process::Command;

use common::*;

/// A tmpfs mounted on a folder, unmounted when dropped (also when the test fails).
struct Tmpfs {
    dir: PathBuf,
}

impl Tmpfs {
    /// Mounts a tmpfs on `dir`, or says why it could not and returns None.
    fn mount(dir: &Path) -> Option<Tmpfs> {
        std::fs::create_dir_all(dir).unwrap();
        let out = Command::new("mount")
            .args(["-t", "tmpfs", "-o", "size=64m", "tmpfs"])
            .arg(dir)
            .output();
        match out {
            Ok(o) if o.status.success() => Some(Tmpfs { dir: dir.into() }),
            Ok(o) => {
                eprintln!(
                    "SKIPPED: cannot mount a tmpfs on {} ({}); the cross-file-system move is \
                     not checked by this run (it needs root or CAP_SYS_ADMIN)",
                    dir.display(),
                    text(&o.stderr).trim()
                );
                None
            }
            Err(e) => {
                eprintln!(
                    "SKIPPED: cannot run mount ({e}); the cross-file-system move is not checked"
                );
                None
            }
        }
    }
}

impl Drop for Tmpfs {
    fn drop(&mut self) {
        let ok = Command::new("umount")
            .arg(&self.dir)
            .status()
            .is_ok_and(|s| s.success());
        if !ok {
            eprintln!("warning: could not unmount {}", self.dir.display());
        }
    }
}

fn paths_section(archive: &str, quarantine: &str) -> String {
    format!(
        "[paths]\ninbox = \"inbox\"\narchive = \"{archive}\"\nquarantine = \"{quarantine}\"\n\
         database = \"lotdrift.db\"\n"
    )
}

fn drop_lots(site: &Site, lots: usize) {
    for lot in 0..lots {
        let code = format!("AL-{:03}", lot + 1);
        let values = lot_values(8, 10.0, 0.1, lot);
        let text = long_file("alder-cells", &code, &lot_date(lot), &[("mass_g", values)]);
        drop_file(&site.inbox(), &format!("{code}.csv"), &text);
    }
}

/// Regular files below `dir`, recursively.
fn files_below(dir: &Path) -> Vec<PathBuf> {
    let mut out = Vec::new();
    let mut stack = vec![dir.to_path_buf()];
    while let Some(d) = stack.pop() {
        for e in std::fs::read_dir(&d).into_iter().flatten().flatten() {
            let p = e.path();
            if p.is_dir() {
                stack.push(p);
            } else {
                out.push(p);
            }
        }
    }
    out
}

#[test]
fn stored_files_move_to_an_archive_on_another_file_system() {
    let site = Site::new(&paths_section("mnt/archive", "quarantine"));
    let Some(_mnt) = Tmpfs::mount(&site.path().join("mnt")) else {
        return;
    };
    drop_lots(&site, 5);
    site.once();
    assert_eq!(site.status()["lots"], 5);
    let archived = files_below(&site.path().join("mnt/archive"));
    assert_eq!(archived.len(), 5, "{archived:?}");
    assert!(
        archived
            .iter()
            .all(|p| !p.file_name().unwrap().to_string_lossy().starts_with('.')),
        "no temporary copies left: {archived:?}"
    );
    assert!(
        site.files_in("inbox").is_empty(),
        "{:?}",
        site.files_in("inbox")
    );
    // The archived bytes are the bytes that were stored: a re-sent copy is a duplicate.
    let first = archived.iter().find(|p| p.ends_with("AL-001.csv")).unwrap();
    std::fs::copy(first, site.inbox().join("again.csv")).unwrap();
    site.once();
    assert_eq!(site.status()["lots"], 5);
    assert!(site.files_in("inbox").is_empty());
}

#[test]
fn refused_files_move_to_a_quarantine_on_another_file_system() {
    let site = Site::new(&paths_section("archive", "mnt/quarantine"));
    let Some(_mnt) = Tmpfs::mount(&site.path().join("mnt")) else {
        return;
    };
    drop_lots(&site, 2);
    drop_file(
        &site.inbox(),
        "bad.csv",
        "source,characteristic,lot,value\nx,y,1,abc\n",
    );
    site.once();
    assert_eq!(site.status()["lots"], 2);
    let q = site.path().join("mnt/quarantine");
    assert!(q.join("bad.csv").is_file());
    let reason = std::fs::read_to_string(q.join("bad.csv.reason.txt")).unwrap();
    assert!(reason.contains("bad.csv"), "{reason}");
    assert_eq!(files_below(&q).len(), 2, "{:?}", files_below(&q));
    assert_eq!(site.files_in("archive").len(), 2);
    assert!(
        site.files_in("inbox").is_empty(),
        "{:?}",
        site.files_in("inbox")
    );
}
