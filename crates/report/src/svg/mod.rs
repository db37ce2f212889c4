//! SVG charts: the Gantt chart of a step ([`gantt`]), each device's memory
//! over the step ([`memory`]) and a line chart of series over categories
//! ([`line`](mod@line), which the sweep draws). Each module has one entry point,
//! `render(input, &options) -> Result<String, ReportError>`.
//!
//! `plotters` (SVG backend only, so no font files are needed to draw) lays out
//! frames, axes and legends; elements that need a `<title>` tooltip are
//! written as plain SVG in the chart's pixel coordinates.

pub mod gantt;
pub mod histogram;
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

/// The part of the time axis a chart shows and the chart's width.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub struct View {
    /// The width of the whole chart (the root `<svg>` element's `width`) in
    /// pixels; `None`: a width that suits the chart.
    pub width_px: Option<u32>,
    /// The time window shown, in nanoseconds from the step's start; `None`:
    /// the whole step.
    pub window: Option<Window>,
}

/// A time window, in nanoseconds from the step's start; `start_ns < end_ns`.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Window {
    /// Where the window starts.
    pub start_ns: u64,
    /// Where it ends.
    pub end_ns: u64,
}

impl View {
    /// The window over a step of `step_ns`: the given one, or the whole step.
    pub fn span(&self, step_ns: u64) -> (u64, u64) {
        match self.window {
            Some(w) => (w.start_ns, w.end_ns.max(w.start_ns + 1)),
            None => (0, step_ns.max(1)),
        }
    }
}

/// The narrowest and widest chart `--width` may ask for.
pub const WIDTH_RANGE_PX: std::ops::RangeInclusive<u32> = 400..=20_000;

/// Splits `text` into lines of at most `max_chars` characters at spaces
/// (a word longer than a line is cut); at most `max_lines` lines, the last
/// ending in `…` when text was left out.
pub(crate) fn wrap(text: &str, max_chars: usize, max_lines: usize) -> Vec<String> {
    let max_chars = max_chars.max(8);
    let mut lines: Vec<String> = Vec::new();
    let mut line = String::new();
    for word in text.split(' ') {
        let mut word: String = word.to_string();
        while word.chars().count() > max_chars {
            let head: String = word.chars().take(max_chars).collect();
            word = word.chars().skip(max_chars).collect();
            if !line.is_empty() {
                lines.push(std::mem::take(&mut line));
            }
            lines.push(head);
        }
        let extra = if line.is_empty() { 0 } else { 1 };
        if line.chars().count() + extra + word.chars().count() > max_chars && !line.is_empty() {
            lines.push(std::mem::take(&mut line));
        }
        if !line.is_empty() {
            line.push(' ');
        }
        line.push_str(&word);
    }
    if !line.is_empty() {
        lines.push(line);
    }
    if lines.len() > max_lines {
        lines.truncate(max_lines);
        let last = lines.last_mut().expect("max_lines >= 1");
        while last.chars().count() + 1 > max_chars {
            last.pop();
        }
        last.push('…');
    }
    lines
}

/// Most operations a chart draws: beyond this, bars are narrower than a pixel
/// and the file grows past what a browser opens comfortably.
pub const MAX_CHART_OPS: usize = 250_000;

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn wrapping_breaks_at_spaces_and_marks_what_is_left_out() {
        assert_eq!(wrap("one two three", 7, 3), ["one two", "three"]);
        assert_eq!(wrap("abcdefghijkl", 8, 3), ["abcdefgh", "ijkl"]);
        assert_eq!(wrap("a b c d e f g h i j", 8, 1), ["a b c d…"]);
        assert_eq!(wrap("", 10, 2), Vec::<String>::new());
    }

    proptest::proptest! {
        /// No line is longer than asked, there are never more lines than
        /// asked, and when nothing is cut the words come back in order.
        #[test]
        fn wrapped_lines_fit_and_keep_the_words(
            words in proptest::collection::vec("[a-z]{1,14}", 0..30),
            max in 8usize..40,
            lines in 1usize..6,
        ) {
            let text = words.join(" ");
            let out = wrap(&text, max, lines);
            proptest::prop_assert!(out.len() <= lines);
            for l in &out {
                proptest::prop_assert!(l.chars().count() <= max, "{l:?}");
            }
            if !out.last().is_some_and(|l| l.ends_with('…')) {
                proptest::prop_assert_eq!(out.join(" ").split(' ').filter(|w| !w.is_empty()).count(),
                    words.iter().map(|w| w.chars().count().div_ceil(max)).sum::<usize>());
            }
        }
    }
}
