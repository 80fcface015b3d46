//! Any bytes into the lot file parser: it returns lots or a positioned error, never panics,
//! and every value it returns is finite and has its unit and sampling time.
#![no_main]

use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    if let Ok(file) = lotdrift::lotfile::parse("fuzz.csv", data) {
        for g in &file.groups {
            assert!(g.values.iter().all(|v| v.is_finite()));
            assert!(!g.values.is_empty());
            assert_eq!(g.units().len(), g.values.len());
            assert_eq!(g.sampled_at().len(), g.values.len());
        }
    }
});
