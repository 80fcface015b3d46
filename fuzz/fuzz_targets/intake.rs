//! Any bytes into the profile reader (`intake::read`) under a profile picked by the first
//! byte, as a text file and as a workbook: lots or positioned problems, never a panic, every
//! value finite.
#![no_main]

use libfuzzer_sys::fuzz_target;
use lotdrift::config::{Delimiter, Encoding, Profile, Zone};

fn profile(selector: u8) -> Profile {
    let mut p = Profile::builtin();
    p.delimiter = match selector & 3 {
        0 => Delimiter::Auto,
        1 => Delimiter::Byte(b';'),
        2 => Delimiter::Byte(b'\t'),
        _ => Delimiter::Byte(b','),
    };
    p.decimal = if selector & 4 != 0 { b',' } else { b'.' };
    p.encoding = if selector & 8 != 0 {
        Encoding::Fixed(encoding_rs_windows_1252())
    } else {
        Encoding::Auto
    };
    p.header_row = (selector & 16 != 0).then_some(2);
    p.zone = Zone::Named("Europe/Berlin".parse().expect("a zone"));
    if selector & 32 != 0 {
        p.date_format = Some("%d.%m.%Y %H:%M".to_owned());
        p.source = Some("fixed".to_owned());
    }
    p
}

fn encoding_rs_windows_1252() -> &'static lotdrift::config::EncodingRs {
    lotdrift::config::EncodingRs::for_label(b"windows-1252").expect("a label")
}

fuzz_target!(|data: &[u8]| {
    let Some((&selector, bytes)) = data.split_first() else {
        return;
    };
    let p = profile(selector);
    for name in ["fuzz.csv", "fuzz.xlsx"] {
        if let Ok(file) = lotdrift::intake::read(name, bytes, Some(&p)) {
            for g in &file.groups {
                assert!(g.values.iter().all(|v| v.is_finite()));
                assert!(!g.values.is_empty());
                assert_eq!(g.units().len(), g.values.len());
                assert_eq!(g.sampled_at().len(), g.values.len());
            }
        }
    }
});
