// Build script:
// - re-runs the build when a migration is added or changed, so `sqlx::migrate!()` embeds it;
// - embeds the demo lot files of demo-data/inbox/ so `lotdrift demo` is self-contained.
use std::fmt::Write as _;
use std::path::Path;

fn main() {
    println!("cargo:rerun-if-changed=migrations");
    println!("cargo:rerun-if-changed=demo-data/inbox");
    // Read when the script runs (not `env!` when it is compiled): one compiled build script
    // can serve checkouts in other folders that share a target directory.
    let manifest = std::env::var("CARGO_MANIFEST_DIR").expect("cargo sets CARGO_MANIFEST_DIR");
    let dir = Path::new(&manifest).join("demo-data/inbox");
    let mut names: Vec<_> = std::fs::read_dir(&dir)
        .map(|rd| {
            rd.flatten()
                .map(|e| e.path())
                .filter(|p| p.is_file())
                .collect()
        })
        .unwrap_or_default();
    names.sort();
    let mut code = String::from(
        "/// The bundled demo lot files: (file name, bytes).\npub const DEMO_FILES: &[(&str, &[u8])] = &[\n",
    );
    for p in &names {
        let name = p.file_name().unwrap().to_string_lossy();
        writeln!(
            code,
            "    ({name:?}, include_bytes!({:?})),",
            p.display().to_string()
        )
        .unwrap();
    }
    code.push_str("];\n");
    let out = Path::new(&std::env::var("OUT_DIR").unwrap()).join("demo_files.rs");
    std::fs::write(out, code).unwrap();
}
