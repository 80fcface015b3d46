//! `[web]`: the daemon's dashboard (`crate::web`). Off unless `listen` is set.

use std::net::SocketAddr;
use std::path::{Path, PathBuf};

use serde::Deserialize;

use super::Problems;

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawWeb {
    pub listen: Option<String>,
    pub token_file: Option<PathBuf>,
}

/// The dashboard's address and where its access token comes from.
#[derive(Debug, Clone, PartialEq)]
pub struct Web {
    pub listen: SocketAddr,
    /// The file whose first line is the access token acknowledgements need. Required for an
    /// address other than loopback; without it the daemon makes a token at start and writes
    /// it beside the database (`lotdrift-web.token`).
    pub token_file: Option<PathBuf>,
}

/// The validated `[web]` section, None when `web.listen` is not set.
pub(super) fn validate_web(p: &mut Problems, base: &Path, raw: RawWeb) -> Option<Web> {
    let token_file = raw
        .token_file
        .map(|f| if f.is_absolute() { f } else { base.join(f) });
    let Some(listen) = raw.listen else {
        if token_file.is_some() {
            p.push(
                "web.token_file",
                "is set but web.listen is not (the dashboard is off)",
            );
        }
        return None;
    };
    let listen: SocketAddr = match listen.parse() {
        Ok(a) => a,
        Err(_) => {
            p.push(
                "web.listen",
                format!("expected an address and port such as \"127.0.0.1:8421\", got {listen:?}"),
            );
            return None;
        }
    };
    if !listen.ip().is_loopback() && token_file.is_none() {
        p.push(
            "web.token_file",
            format!(
                "is required when web.listen is not a loopback address ({listen}): \
                 acknowledgements from other machines need an access token"
            ),
        );
    }
    if let Some(f) = &token_file {
        match std::fs::read_to_string(f) {
            Ok(t) if t.lines().next().is_some_and(|l| l.trim().len() >= 16) => {}
            Ok(_) => p.push(
                "web.token_file",
                format!(
                    "{}: the first line must hold a token of at least 16 characters",
                    f.display()
                ),
            ),
            Err(e) => p.push(
                "web.token_file",
                format!("cannot read {}: {e}", f.display()),
            ),
        }
    }
    Some(Web { listen, token_file })
}
