//! Wall-clock time as the stored text form: RFC 3339, UTC, millisecond precision, fixed width
//! ("2026-03-01T08:30:00.000Z"), so that text order is time order.

use chrono::{DateTime, SecondsFormat, Utc};

/// Now, in the stored form.
pub fn now_rfc3339() -> String {
    format_utc(Utc::now())
}

/// A UTC time in the stored form.
pub fn format_utc(t: DateTime<Utc>) -> String {
    t.to_rfc3339_opts(SecondsFormat::Millis, true)
}

/// Parses the stored form (or any RFC 3339 time) back.
pub fn parse_utc(s: &str) -> Option<DateTime<Utc>> {
    DateTime::parse_from_rfc3339(s)
        .ok()
        .map(|t| t.with_timezone(&Utc))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn fixed_width_round_trip() {
        let t = parse_utc("2026-03-01T08:30:00+02:00").unwrap();
        assert_eq!(format_utc(t), "2026-03-01T06:30:00.000Z");
        assert_eq!(now_rfc3339().len(), 24);
    }
}
