//! Any bytes into the lot file parser: it returns lots or a positioned error, never panics,
//! and every value it returns is finite.
#![no_main]

use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    if let Ok(file) = lotdrift::lotfile::parse("fuzz.csv", data) {
        for g in &file.groups {
            assert!(g.values.iter().all(|v| v.is_finite()));
            assert!(!g.values.is_empty());
        }
    }
});
