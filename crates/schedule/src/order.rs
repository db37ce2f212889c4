//! Orders as text a person edits: one line per device, one token per op.
//!
//! ```text
//! # 2 stages, 3 micro-batches, backward split into B and W
//! 0: F0 F1 B0 F2 B1 W0 B2 W1 W2
//! 1: F0 B0 F1 B1 W0 F2 B2 W1 W2
//! ```
//!
//! * A line is `<device>: <tokens>`; a device's order may continue on more
//!   lines that start with its number again. Blank lines and everything after
//!   `#` are ignored.
//! * A token is a letter and a micro-batch: `F3` (forward of micro-batch 3),
//!   `B3` (backward; its input-gradient part when the order has W tokens),
//!   `W3` (weight gradient). With several chunks per device, `.c` names the
//!   chunk: `F3.1`. Letters may be lower case.
//! * An order without W tokens runs each backward as one op (fused); with W
//!   tokens every backward is split and each needs its W.
//!
//! [`parse`] checks everything a plan must satisfy and reports each problem
//! at its line and column (1-based): an unknown token, a device the pipeline
//! does not have, a missing or repeated op, a W before its B, and orders that
//! wait on each other forever (the cycle of waits).

use std::collections::HashMap;

use thiserror::Error;

use crate::{validate, Op, OpKind, Plan, ScheduleError, ScheduleKind, Shape};

/// Where a token is in the text: 1-based line and column (in characters).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Position {
    /// Line.
    pub line: usize,
    /// Column.
    pub col: usize,
}

/// A problem in an order file, at a place in it.
#[derive(Clone, Debug, Error, PartialEq, Eq)]
#[error("line {line}, col {col}: {message}")]
pub struct OrderError {
    /// Line (1-based).
    pub line: usize,
    /// Column (1-based).
    pub col: usize,
    /// What is wrong, in the order's own terms.
    pub message: String,
}

/// A parsed order and where each of its ops was written.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Parsed {
    /// The plan (kind `custom`).
    pub plan: Plan,
    /// `positions[d][k]`: where device `d`'s `k`-th op was written.
    pub positions: Vec<Vec<Position>>,
}

fn token_of(op: Op, shape: &Shape) -> String {
    crate::order_token(op, shape)
}

/// Reads `text` as the order of a pipeline of `stages` devices,
/// `micro_batches` micro-batches and `chunks` chunks per device, and proves
/// it runs to the end ([`validate`]), turning any problem into an
/// [`OrderError`] at its place.
pub fn parse(text: &str, stages: u32, micro_batches: u32, chunks: u32) -> Result<Parsed, OrderError> {
    let shape = Shape::new(stages, micro_batches, chunks);
    let p = stages as usize;
    let mut per_device: Vec<Vec<Op>> = vec![Vec::new(); p];
    let mut positions: Vec<Vec<Position>> = vec![Vec::new(); p];
    let mut first_line: Vec<Option<usize>> = vec![None; p];
    let mut last_line = 1;
    let mut any_weight: Option<Position> = None;
    for (n, raw) in text.lines().enumerate() {
        let line = n + 1;
        last_line = line;
        let content = raw.split('#').next().unwrap_or("");
        if content.trim().is_empty() {
            continue;
        }
        let col_of = |byte: usize| raw[..byte].chars().count() + 1;
        let lead = content.len() - content.trim_start().len();
        let Some(colon) = content.find(':') else {
            return Err(OrderError {
                line,
                col: col_of(lead),
                message: "expected `<device>: <ops>`, for example `0: F0 F1 B0`".into(),
            });
        };
        let label = content[..colon].trim();
        let device: usize = match label.parse::<u32>() {
            Ok(d) if (d as usize) < p => d as usize,
            Ok(d) => {
                return Err(OrderError {
                    line,
                    col: col_of(lead),
                    message: format!(
                        "device {d} is not in the pipeline: it has {stages} stages, devices 0 to {}",
                        stages.saturating_sub(1)
                    ),
                })
            }
            Err(_) => {
                return Err(OrderError {
                    line,
                    col: col_of(lead),
                    message: format!("`{label}` is not a device number"),
                })
            }
        };
        first_line[device].get_or_insert(line);
        let rest = &content[colon + 1..];
        let mut at = colon + 1;
        for piece in rest.split(|c: char| c.is_whitespace() || c == ',') {
            let start = at;
            at += piece.len() + 1;
            if piece.is_empty() {
                continue;
            }
            let pos = Position { line, col: col_of(start) };
            let op = read_token(piece, device as u32, &shape).map_err(|message| OrderError {
                line,
                col: pos.col,
                message,
            })?;
            if op.kind == OpKind::Weight {
                any_weight.get_or_insert(pos);
            }
            per_device[device].push(op);
            positions[device].push(pos);
        }
    }
    let split = any_weight.is_some();
    let shape = Shape { split_backward: split, ..shape };
    // Repeated ops, then W before B on its device, then missing ones.
    let mut seen: HashMap<Op, Position> = HashMap::new();
    for d in 0..p {
        let mut b_done = vec![false; shape.op_slots()];
        for (k, &op) in per_device[d].iter().enumerate() {
            let pos = positions[d][k];
            if let Some(first) = seen.insert(op, pos) {
                return Err(OrderError {
                    line: pos.line,
                    col: pos.col,
                    message: format!(
                        "{} appears twice on device {d} (first at line {}, col {})",
                        token_of(op, &shape),
                        first.line,
                        first.col
                    ),
                });
            }
            match op.kind {
                OpKind::Backward => b_done[shape.op_index(op)] = true,
                OpKind::Weight if !b_done[shape.op_index(Op::backward(op.micro_batch, op.stage))] => {
                    let b = Op::backward(op.micro_batch, op.stage);
                    let later = per_device[d].iter().position(|&x| x == b).map(|k| positions[d][k]);
                    let where_b = match later {
                        Some(q) => format!(", which comes later (line {}, col {})", q.line, q.col),
                        None => String::new(),
                    };
                    return Err(OrderError {
                        line: pos.line,
                        col: pos.col,
                        message: format!(
                            "{} comes before its {}{where_b}: a weight pass needs its backward",
                            token_of(op, &shape),
                            token_of(b, &shape)
                        ),
                    });
                }
                _ => {}
            }
        }
    }
    for (d, first) in first_line.iter().enumerate() {
        let mut missing = Vec::new();
        for chunk in 0..chunks {
            let stage = chunk * stages + d as u32;
            for &kind in shape.kinds() {
                for i in 0..micro_batches {
                    let op = Op { kind, micro_batch: i, stage };
                    if !seen.contains_key(&op) {
                        missing.push(token_of(op, &shape));
                    }
                }
            }
        }
        if !missing.is_empty() {
            let line = first.unwrap_or(last_line);
            let shown: Vec<&str> = missing.iter().take(8).map(String::as_str).collect();
            let more = if missing.len() > 8 { format!(" and {} more", missing.len() - 8) } else { String::new() };
            let why = if split && missing.iter().all(|t| t.starts_with('W')) {
                " (an order with any W token splits every backward, so each B needs its W)"
            } else {
                ""
            };
            let message = match first {
                None => format!("device {d} has no line: it misses all its ops ({}{more})", shown.join(" ")),
                Some(_) => format!("device {d} misses {}{more}{why}", shown.join(" ")),
            };
            return Err(OrderError { line, col: 1, message });
        }
    }
    let plan = Plan { kind: ScheduleKind::Custom, shape, per_device };
    match validate(&plan) {
        Ok(()) => Ok(Parsed { plan, positions }),
        Err(ScheduleError::Deadlock { cycle }) => {
            let first = cycle[0];
            let pos = positions[first.device as usize][first.index];
            let n = cycle.len();
            let links: Vec<String> = (0..n)
                .map(|k| {
                    let w = cycle[k];
                    let next = cycle[(k + 1) % n];
                    let at = positions[w.device as usize][w.index];
                    let after = if next.at == w.needs {
                        String::new()
                    } else {
                        format!(", which comes after {}", token_of(next.at, &shape))
                    };
                    format!(
                        "device {} waits at {} (line {}, col {}) for {} on device {}{after}",
                        w.device,
                        token_of(w.at, &shape),
                        at.line,
                        at.col,
                        token_of(w.needs, &shape),
                        next.device
                    )
                })
                .collect();
            Err(OrderError { line: pos.line, col: pos.col, message: format!("deadlock: {}", links.join("; ")) })
        }
        Err(e) => Err(OrderError { line: 1, col: 1, message: e.to_string() }),
    }
}

/// One token on `device`'s line.
fn read_token(tok: &str, device: u32, shape: &Shape) -> Result<Op, String> {
    let unknown = || {
        let chunk_hint = if shape.chunks > 1 { " with its chunk, like `F3.1`" } else { "" };
        format!(
            "unknown token `{tok}`: expected F, B or W and a micro-batch number{chunk_hint} (`F3` forward of micro-batch 3, `B3` backward, `W3` weight gradient)"
        )
    };
    let mut chars = tok.chars();
    let kind = match chars.next().map(|c| c.to_ascii_uppercase()) {
        Some('F') => OpKind::Forward,
        Some('B') => OpKind::Backward,
        Some('W') => OpKind::Weight,
        _ => return Err(unknown()),
    };
    let rest = chars.as_str();
    let (mb, chunk) = match rest.split_once('.') {
        Some((a, c)) => (a, Some(c)),
        None => (rest, None),
    };
    if mb.is_empty() || !mb.bytes().all(|b| b.is_ascii_digit()) {
        return Err(unknown());
    }
    let micro_batch: u32 = mb.parse().map_err(|_| unknown())?;
    if micro_batch >= shape.micro_batches {
        return Err(format!(
            "`{tok}`: micro-batch {micro_batch} does not exist: the step has {} micro-batches, 0 to {}",
            shape.micro_batches,
            shape.micro_batches - 1
        ));
    }
    let chunk: u32 = match chunk {
        None if shape.chunks > 1 => {
            return Err(format!(
                "`{tok}` needs its chunk: with {} chunks per device write `{tok}.0` to `{tok}.{}`",
                shape.chunks,
                shape.chunks - 1
            ))
        }
        None => 0,
        Some(c) if !c.is_empty() && c.bytes().all(|b| b.is_ascii_digit()) => match c.parse::<u32>() {
            Ok(c) if c < shape.chunks => c,
            _ => {
                return Err(format!(
                    "`{tok}`: chunk {c} does not exist: each device has {} chunk{}, 0 to {}",
                    shape.chunks,
                    if shape.chunks == 1 { "" } else { "s" },
                    shape.chunks - 1
                ))
            }
        },
        Some(_) => return Err(unknown()),
    };
    Ok(Op { kind, micro_batch, stage: chunk * shape.stages + device })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::{build, order_text};

    fn err(text: &str, p: u32, m: u32, v: u32) -> String {
        parse(text, p, m, v).unwrap_err().to_string()
    }

    #[test]
    fn reads_a_hand_written_order_with_comments() {
        let text = "# two stages\n0: F0 F1 B0 # warm-up\n0: B1\n\n1: F0 B0 F1 B1\n";
        let parsed = parse(text, 2, 2, 1).unwrap();
        assert!(!parsed.plan.shape.split_backward);
        assert_eq!(parsed.plan.per_device[0].len(), 4);
        assert_eq!(parsed.positions[0][3], Position { line: 3, col: 4 });
        assert_eq!(parsed.plan.kind, ScheduleKind::Custom);
    }

    #[test]
    fn every_built_order_reads_back_as_itself() {
        for kind in ScheduleKind::ALL {
            let (m, v) = if kind == ScheduleKind::Interleaved { (8, 2) } else { (6, 1) };
            let plan = build(kind, Shape::new(4, m, v)).unwrap();
            let parsed = parse(&order_text(&plan), 4, m, v).unwrap();
            assert_eq!(parsed.plan.per_device, plan.per_device, "{kind}");
            assert_eq!(parsed.plan.shape, plan.shape, "{kind}");
        }
    }

    #[test]
    fn problems_are_reported_where_they_are() {
        assert_eq!(
            err("0: F0 X1 B0\n1: F0 B0\n", 2, 1, 1),
            "line 1, col 7: unknown token `X1`: expected F, B or W and a micro-batch number (`F3` forward of micro-batch 3, `B3` backward, `W3` weight gradient)"
        );
        assert_eq!(
            err("0: F0 B0\n2: F0 B0\n", 2, 1, 1),
            "line 2, col 1: device 2 is not in the pipeline: it has 2 stages, devices 0 to 1"
        );
        assert_eq!(
            err("0: F0 B0 F0\n1: F0 B0\n", 2, 1, 1),
            "line 1, col 10: F0 appears twice on device 0 (first at line 1, col 4)"
        );
        assert_eq!(err("0: F0 B0\n1: F0\n", 2, 1, 1), "line 2, col 1: device 1 misses B0");
        assert_eq!(
            err("0: F0 B0 W0\n1: F0 W0 B0\n", 2, 1, 1),
            "line 2, col 7: W0 comes before its B0, which comes later (line 2, col 10): a weight pass needs its backward"
        );
        assert_eq!(
            err("0: F0 F1.1\n", 1, 2, 1),
            "line 1, col 7: `F1.1`: chunk 1 does not exist: each device has 1 chunk, 0 to 0"
        );
        assert!(err("0: F5 B5\n", 1, 2, 1).contains("micro-batch 5 does not exist"));
        assert!(err("0: F0 B0\n1 F0 B0\n", 2, 1, 1).contains("line 2, col 1: expected `<device>: <ops>`"));
    }

    #[test]
    fn a_deadlock_names_its_cycle_with_places() {
        // Device 0 runs B0 before F1, device 1 wants F1 before B0.
        let text = "0: F0 B0 F1 B1\n1: F0 F1 B0 B1\n";
        assert_eq!(
            err(text, 2, 2, 1),
            "line 1, col 7: deadlock: device 0 waits at B0 (line 1, col 7) for B0 on device 1, which comes after F1; \
             device 1 waits at F1 (line 2, col 7) for F1 on device 0, which comes after B0"
        );
        // A longer cycle over three devices.
        let text = "0: F0 F1 B0 B1\n1: F0 B0 F1 B1\n2: F0 F1 B0 B1\n";
        let e = err(text, 3, 2, 1);
        assert!(e.starts_with("line 2, col 7: deadlock: device 1 waits at B0"), "{e}");
    }
}
