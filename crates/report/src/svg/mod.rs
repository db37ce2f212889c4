//! SVG charts: the Gantt chart of a step ([`gantt`]), each device's memory
//! over the step ([`memory`]) and a line chart of series over categories
//! ([`line`](mod@line), which the sweep draws). Each module has one entry point,
//! `render(input, &options) -> Result<String, ReportError>`.
//!
//! `plotters` (SVG backend only, so no font files are needed to draw) lays out
//! frames, axes and legends; elements that need a `<title>` tooltip are
//! written as plain SVG in the chart's pixel coordinates.

pub mod gantt;
pub mod line;
pub mod memory;

use crate::ReportError;

/// A colour as red, green, blue.
pub(crate) type Rgb = (u8, u8, u8);

pub(crate) fn hex((r, g, b): (u8, u8, u8)) -> String {
    format!("#{r:02x}{g:02x}{b:02x}")
}

/// Text on a bar: white on dark colours, near-black on light ones.
pub(crate) fn ink_on((r, g, b): (u8, u8, u8)) -> &'static str {
    let luma = 0.299 * r as f64 + 0.587 * g as f64 + 0.114 * b as f64;
    if luma < 140.0 {
        "#ffffff"
    } else {
        "#1a1a1a"
    }
}

/// Escapes text for XML content and attributes.
pub fn xml_escape(s: &str) -> String {
    let mut out = String::with_capacity(s.len());
    for c in s.chars() {
        match c {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&apos;"),
            c if (c as u32) < 0x20 && c != '\n' && c != '\t' => out.push(' '),
            c => out.push(c),
        }
    }
    out
}

pub(crate) fn draw_err<E: std::fmt::Debug>(e: E) -> ReportError {
    ReportError::Draw(format!("{e:?}"))
}

/// Most operations a chart draws: beyond this, bars are narrower than a pixel
/// and the file grows past what a browser opens comfortably.
pub const MAX_CHART_OPS: usize = 250_000;
