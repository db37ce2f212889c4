//! The report as JSON.

use crate::{Report, ReportError};

/// How the JSON is laid out.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct JsonOptions {
    /// Indented (the default) or on one line.
    pub pretty: bool,
}

impl Default for JsonOptions {
    fn default() -> Self {
        JsonOptions { pretty: true }
    }
}

/// The report as JSON, ending with a newline.
pub fn render(report: &Report, options: &JsonOptions) -> Result<String, ReportError> {
    let mut s = if options.pretty { serde_json::to_string_pretty(report)? } else { serde_json::to_string(report)? };
    s.push('\n');
    Ok(s)
}
