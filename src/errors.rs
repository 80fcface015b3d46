//! An error and its causes as one line: what failed and where, then each cause once.
//!
//! Our error variants name what failed and where and leave the cause to `source()`; some
//! library errors repeat their cause's text in their own (a database error "(code: 13)
//! database or disk is full" whose source says the same), so a cause already said is skipped.

/// `e` and its sources, joined by ": ", each text once.
pub fn chain(e: &(dyn std::error::Error + 'static)) -> String {
    join(std::iter::successors(Some(e), |e| e.source()).map(|e| e.to_string()))
}

/// Messages from the outermost in, joined by ": ", skipping any already contained in what was
/// said before.
pub fn join(messages: impl IntoIterator<Item = String>) -> String {
    let mut out = String::new();
    for m in messages {
        if m.is_empty() || out.contains(&m) {
            continue;
        }
        if !out.is_empty() {
            out.push_str(": ");
        }
        out.push_str(&m);
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[derive(Debug, thiserror::Error)]
    #[error("database error while storing a batch")]
    struct Outer {
        source: Middle,
    }

    #[derive(Debug, thiserror::Error)]
    #[error("error returned from database: (code: 13) database or disk is full")]
    struct Middle {
        source: Inner,
    }

    #[derive(Debug, thiserror::Error)]
    #[error("(code: 13) database or disk is full")]
    struct Inner;

    #[test]
    fn each_cause_is_said_once() {
        let e = Outer {
            source: Middle { source: Inner },
        };
        assert_eq!(
            chain(&e),
            "database error while storing a batch: error returned from database: (code: 13) \
             database or disk is full"
        );
    }
}
