//! `lotdrift backup FILE` through the binary: the copy is a working database that a new site
//! can run on, and an existing FILE is never overwritten.

mod common;

use common::*;

fn drop_lots(site: &Site, lots: std::ops::Range<usize>) {
    for lot in lots {
        let code = format!("AL-{:03}", lot + 1);
        let values = lot_values(8, 10.0, 0.1, lot);
        let text = long_file("alder-cells", &code, &lot_date(lot), &[("mass_g", values)]);
        drop_file(&site.inbox(), &format!("{code}.csv"), &text);
    }
}

#[test]
fn a_backup_restores_into_a_working_database() {
    let site = Site::new("");
    drop_lots(&site, 0..6);
    site.once();
    assert_eq!(site.status()["lots"], 6);

    // Taken while the daemon runs.
    let mut daemon = site.spawn_daemon();
    let copy = site.path().join("copy.db");
    let out = site.run(&["backup", copy.to_str().unwrap()]);
    sigterm(&daemon);
    assert!(wait_exit(&mut daemon, std::time::Duration::from_secs(30)).success());
    assert!(out.status.success(), "backup failed: {}", text(&out.stderr));
    let said = text(&out.stdout);
    assert!(said.contains(copy.to_str().unwrap()), "{said}");
    assert!(said.contains("6 lots"), "{said}");
    assert!(said.contains("48 measurements"), "{said}");
    assert!(said.contains("integrity ok"), "{said}");

    // Never overwrites: exit 2 naming the path, the copy unchanged.
    let before = std::fs::read(&copy).unwrap();
    let again = site.run(&["backup", copy.to_str().unwrap()]);
    assert_eq!(again.status.code(), Some(2), "{}", text(&again.stderr));
    assert!(
        text(&again.stderr).contains(copy.to_str().unwrap()),
        "{}",
        text(&again.stderr)
    );
    assert_eq!(std::fs::read(&copy).unwrap(), before);

    // Restore: the copy as a new site's database, then more lots on top of it.
    let restored = Site::new("");
    std::fs::copy(&copy, restored.path().join("lotdrift.db")).unwrap();
    drop_lots(&restored, 6..10);
    restored.once();
    let status = restored.status();
    assert_eq!(status["lots"], 10, "{status}");
    assert_eq!(status["measurements"], 80, "{status}");
    assert_eq!(status["files"], 10, "{status}");
}
