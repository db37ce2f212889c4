//! Helpers shared by the integration tests, including a reference model of a
//! pipelined step written from the README's rules alone. It shares no code
//! with baton: its per-device orders, timing and transfer costs are computed
//! here, so a test can hold baton's numbers against it.
#![allow(dead_code)]

use std::process::{Command, Output};

/// Runs the `baton` command with `args` from the project's root.
pub fn baton(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_baton")).args(args).current_dir(env!("CARGO_MANIFEST_DIR")).output().unwrap()
}

/// Bytes as text (lossy).
pub fn text(b: &[u8]) -> String {
    String::from_utf8_lossy(b).into_owned()
}

/// A command's standard output as JSON (it must have exited, with JSON).
pub fn json(out: &Output) -> serde_json::Value {
    assert!(out.status.code().is_some(), "killed");
    serde_json::from_slice(&out.stdout).unwrap_or_else(|e| panic!("{e}: {}", text(&out.stderr)))
}

/// One pipeline stage on its own device: forward and backward time, and the
/// bytes of its output activation (which also sizes the gradient that comes
/// back across the same boundary).
#[derive(Clone, Copy, Debug)]
pub struct RefStage {
    pub forward_ns: u64,
    pub backward_ns: u64,
    pub send_bytes: u64,
}

/// What the reference model computes for one step.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct RefStep {
    pub step_ns: u64,
    /// Per device: busy time.
    pub busy_ns: Vec<u64>,
}

#[derive(Clone, Copy, Debug, PartialEq, Eq)]
enum Kind {
    F,
    B,
}

/// Device `d`'s order under `schedule` (`fill-drain` or `1f1b`) with `p`
/// stages and `m` micro-batches, as the README's "Schedules" section defines
/// them: fill-drain runs every forward then every backward; 1F1B warms up
/// with min(p - d - 1, m) forwards, alternates one forward and one backward,
/// then runs the remaining backwards.
fn order(schedule: &str, p: usize, m: usize, d: usize) -> Vec<(Kind, usize)> {
    match schedule {
        "fill-drain" => (0..m).map(|i| (Kind::F, i)).chain((0..m).map(|i| (Kind::B, i))).collect(),
        "1f1b" => {
            let warm = (p - d - 1).min(m);
            let mut v: Vec<(Kind, usize)> = (0..warm).map(|i| (Kind::F, i)).collect();
            let (mut f, mut b) = (warm, 0);
            while f < m {
                v.push((Kind::F, f));
                f += 1;
                v.push((Kind::B, b));
                b += 1;
            }
            v.extend((b..m).map(|i| (Kind::B, i)));
            v
        }
        other => panic!("the reference model knows fill-drain and 1f1b, not {other}"),
    }
}

/// Plays one step of `stages` (one per device, in order) with `m`
/// micro-batches over links of `latency_ns` and `bytes_per_s` (each ordered
/// device pair its own link). An op starts when its device is free and its
/// input has arrived; a transfer alone takes ceil(bytes / bandwidth) for its
/// bytes to leave, then the latency. Returns `None` when two transfers would
/// be on one link at once (sharing is outside this model).
pub fn reference_step(
    stages: &[RefStage],
    m: usize,
    schedule: &str,
    latency_ns: u64,
    bytes_per_s: u64,
) -> Option<RefStep> {
    let p = stages.len();
    let orders: Vec<Vec<(Kind, usize)>> = (0..p).map(|d| order(schedule, p, m, d)).collect();
    let push_ns = |bytes: u64| (bytes as u128 * 1_000_000_000).div_ceil(bytes_per_s as u128) as u64;
    // end[kind][device][micro-batch], when known.
    let mut end = vec![vec![vec![None::<u64>; m]; p]; 2];
    // Per directed link (from, to): the intervals during which bytes leave.
    let mut on_link: std::collections::HashMap<(usize, usize), Vec<(u64, u64)>> = Default::default();
    let mut next = vec![0usize; p];
    let mut free = vec![0u64; p];
    let mut busy = vec![0u64; p];
    let arrival = |from: usize,
                   to: usize,
                   produced: u64,
                   bytes: u64,
                   links: &mut std::collections::HashMap<(usize, usize), Vec<(u64, u64)>>| {
        let out = produced + push_ns(bytes);
        if bytes > 0 {
            links.entry((from, to)).or_default().push((produced, out));
        }
        out + latency_ns
    };
    let total: usize = orders.iter().map(Vec::len).sum();
    let mut done = 0;
    while done < total {
        let mut progressed = false;
        for d in 0..p {
            let Some(&(kind, i)) = orders[d].get(next[d]) else { continue };
            let ready = match kind {
                Kind::F if d == 0 => Some(0),
                Kind::F => end[0][d - 1][i]
                    .map(|t| (d - 1, t))
                    .map(|(s, t)| arrival(s, d, t, stages[s].send_bytes, &mut on_link)),
                Kind::B => match end[0][d][i] {
                    None => None,
                    Some(f) if d + 1 == p => Some(f),
                    Some(f) => {
                        end[1][d + 1][i].map(|t| arrival(d + 1, d, t, stages[d].send_bytes, &mut on_link).max(f))
                    }
                },
            };
            let Some(ready) = ready else { continue };
            let start = ready.max(free[d]);
            let dur = if kind == Kind::F { stages[d].forward_ns } else { stages[d].backward_ns };
            end[(kind == Kind::B) as usize][d][i] = Some(start + dur);
            free[d] = start + dur;
            busy[d] += dur;
            next[d] += 1;
            done += 1;
            progressed = true;
        }
        assert!(progressed, "the reference orders deadlock");
    }
    // Each transfer is recorded once, when its consumer is scheduled.
    for intervals in on_link.values_mut() {
        intervals.sort_unstable();
        if intervals.windows(2).any(|w| w[1].0 < w[0].1) {
            return None;
        }
    }
    Some(RefStep { step_ns: *free.iter().max().unwrap_or(&0), busy_ns: busy })
}

/// Sums layers into stages: `layers[i] = (forward_ns, backward_ns, activation_bytes)`,
/// `split[k]` layers per stage; a stage sends its last layer's activation.
pub fn stages_of(layers: &[(u64, u64, u64)], split: &[usize]) -> Vec<RefStage> {
    let mut at = 0;
    split
        .iter()
        .map(|&n| {
            let part = &layers[at..at + n];
            at += n;
            RefStage {
                forward_ns: part.iter().map(|l| l.0).sum(),
                backward_ns: part.iter().map(|l| l.1).sum(),
                send_bytes: part.last().map_or(0, |l| l.2),
            }
        })
        .collect()
}
