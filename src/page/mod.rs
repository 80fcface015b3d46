//! Pages for people: the HTML report (`lotdrift report`) and the daemon's dashboard (`web`)
//! share these models, charts and templates.
//!
//! **Every name from a lot file is escaped**: templates are rendered by minijinja with HTML
//! auto-escaping on, and the SVG writer escapes every text it writes itself; a chart is the
//! only markup a template takes as it is. Pages need no script and load nothing from the
//! network: the style sheet and the charts are inline.
//!
//! This module formats; it reads through `store` (`model`) and takes its limits from
//! `engine::limits`, so a chart cannot disagree with the decision it shows.

pub mod fmt;
pub mod model;
pub mod report;
pub mod svg;

use minijinja::Environment;

/// The style sheet inlined into every page.
pub const CSS: &str = include_str!("templates/style.css");

/// `text` with the five HTML-special characters escaped (for attribute values and text).
pub fn escape(text: &str) -> String {
    let mut out = String::with_capacity(text.len());
    for c in text.chars() {
        match c {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&#39;"),
            c => out.push(c),
        }
    }
    out
}

/// The templates, compiled into the binary (auto-escaping HTML by their `.html` names).
pub fn templates() -> Environment<'static> {
    let mut env = Environment::new();
    for (name, text) in [
        ("macros.html", include_str!("templates/macros.html")),
        ("report.html", include_str!("templates/report.html")),
        ("dashboard.html", include_str!("templates/dashboard.html")),
    ] {
        env.add_template(name, text)
            .expect("the bundled templates are valid");
    }
    env
}
