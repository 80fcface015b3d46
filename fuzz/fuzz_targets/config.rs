//! Any text into the config parser: a validated config or an error naming a key or
//! position, never a panic.
#![no_main]

use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    if let Ok(text) = std::str::from_utf8(data) {
        let _ =
            lotdrift::config::Config::from_toml(std::path::Path::new("/fuzz/lotdrift.toml"), text);
    }
});
