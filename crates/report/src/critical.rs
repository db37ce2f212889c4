//! Why the step takes what it takes: the realised graph of a step, each
//! op's and transfer's slack, and the critical path.
//!
//! The graph is the step as it ran: a node per op (every device's ops,
//! device work included), per pipeline transfer, and, for a device whose
//! step ends after its last op (gradient synchronisation, the update), a
//! `sync` tail from that op's end to the device's end. A node's
//! predecessors are the op before it on its device, the transfer that
//! brought the data it needed from another device (the last rank's share
//! for a tensor group; data from a stage on the same device needs no edge,
//! the device's order implies it), and with blocking sends the previous
//! op's transfer. Durations are the
//! realised ones. A node's **slack** is how much later it could end without
//! moving the step's end, every other duration fixed: the latest finish
//! `LF(x) = min over successors y of (LF(y) - duration(y))`, `LF = step end`
//! for the last nodes, minus its end.
//!
//! The **critical path** walks back from a node that ends with the step
//! through predecessors that end exactly when their successor starts and
//! have no slack (the data dependency first, then the device's order); when
//! nothing explains a start (device work waiting for a collective), the wait
//! is a link of its own (`sync`). Its links' durations add up to the step
//! time exactly. Gradient collectives and tensor all-reduces are not nodes:
//! a device's tail and its waits for a collective stand for them, and a
//! tensor op's time includes its all-reduces.

use baton_engine::SimTime;
use baton_executor::Trace;
use baton_schedule::{Op, OpKind};
use serde::Serialize;

/// One link of the critical path.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct PathEntry {
    /// As in the trace CSV: `forward`, `backward`, `weight`, `encode`,
    /// `update`, `send`, or `sync` (waiting for, or finishing, the gradient
    /// synchronisation).
    pub kind: &'static str,
    /// The device that ran it (a transfer's sender).
    pub device: u32,
    /// Its micro-batch (`null` for `sync`).
    pub micro_batch: Option<u32>,
    /// Its virtual stage (a transfer's sending one; `null` for `sync`).
    pub stage: Option<u32>,
    /// Start, in milliseconds from the step's start.
    pub start_ms: f64,
    /// End, in milliseconds from the step's start.
    pub end_ms: f64,
    #[serde(skip)]
    pub(crate) start_ns: u64,
    #[serde(skip)]
    pub(crate) end_ns: u64,
    #[serde(skip)]
    pub(crate) op: Option<Op>,
    /// A send's receiving device (`null` for the rest).
    pub(crate) to_device: Option<u32>,
    #[serde(skip)]
    pub(crate) link: Option<u32>,
}

impl PathEntry {
    /// Start, in ns of simulated time.
    pub fn start_ns(&self) -> u64 {
        self.start_ns
    }
    /// End, in ns of simulated time.
    pub fn end_ns(&self) -> u64 {
        self.end_ns
    }
    /// A send's receiving device.
    pub fn to_device(&self) -> Option<u32> {
        self.to_device
    }
}

/// The realised graph of a step.
pub struct Graph<'a> {
    trace: &'a Trace,
    /// First node id of each device's ops.
    offset: Vec<usize>,
    ops: usize,
    /// The devices whose step ends after their last op, one tail node each.
    tail_device: Vec<u32>,
    shares: usize,
    /// Every node's (start, end) in ns.
    spans: Vec<(u64, u64)>,
    /// Node `id`'s predecessors are `preds[pred_start[id]..pred_start[id + 1]]`
    /// (the op before on its device first when there is one).
    pred_start: Vec<u32>,
    preds: Vec<u32>,
}

#[derive(Clone, Copy, Debug, PartialEq, Eq)]
enum Node {
    Op(u32, u32),
    Transfer(usize),
    Tail(u32),
}

impl<'a> Graph<'a> {
    /// The graph of `trace`.
    pub fn of(trace: &'a Trace) -> Self {
        let mut offset = Vec::with_capacity(trace.ops.len());
        let mut n = 0usize;
        for recs in &trace.ops {
            offset.push(n);
            n += recs.len();
        }
        let ops = n;
        let mut tail_device = Vec::new();
        for (d, recs) in trace.ops.iter().enumerate() {
            let end = trace.device_end.get(d).copied().unwrap_or(SimTime::ZERO);
            if let Some(last) = recs.last() {
                if end > last.end {
                    tail_device.push(d as u32);
                }
            }
        }
        let mut g = Graph {
            trace,
            offset,
            ops,
            tail_device,
            shares: trace.tensor.max(1) as usize,
            spans: Vec::new(),
            pred_start: Vec::new(),
            preds: Vec::new(),
        };
        let n = g.len();
        let spans: Vec<(u64, u64)> = (0..n).map(|id| g.span_of(id)).collect();
        // Edges (predecessor, node): each op after the one before it on its
        // device; each send after its producer, and its consumer after the
        // last share of it (a tensor group waits for every rank's share);
        // with blocking sends, an op after its device's previous send; a
        // tail after its device's last op. (Data between stages on the same
        // device needs no edge: the device's order already implies it.)
        let mut edges: Vec<(u32, u32)> = Vec::with_capacity(2 * n);
        for (d, recs) in trace.ops.iter().enumerate() {
            for i in 1..recs.len() {
                let id = g.offset[d] + i;
                edges.push(((id - 1) as u32, id as u32));
            }
        }
        let shares = g.shares;
        let p = trace.plan.shape.stages.max(1);
        let replica_of = |device: u32| device / shares as u32 / p;
        let mut k = 0;
        while k < trace.transfers.len() {
            let end = (k + shares).min(trace.transfers.len());
            let last = (k..end).max_by_key(|&x| (trace.transfers[x].end, std::cmp::Reverse(x))).unwrap_or(k);
            for x in k..end {
                let r = &trace.transfers[x];
                let replica = replica_of(r.src);
                let (_, pi) = trace.position_in(replica, r.producer());
                edges.push(((g.offset[r.src as usize] + pi as usize) as u32, (g.ops + x) as u32));
                let (_, ci) = trace.position_in(replica, r.consumer());
                edges.push(((g.ops + last) as u32, (g.offset[r.dst as usize] + ci as usize) as u32));
            }
            k = end;
        }
        if trace.blocking_sends {
            for (d, recs) in trace.ops.iter().enumerate() {
                for i in 1..recs.len() {
                    if let Some(t) = trace.outgoing_index_in(replica_of(d as u32), recs[i - 1].op) {
                        let x = t + (d % shares);
                        if x < trace.transfers.len() {
                            edges.push(((g.ops + x) as u32, (g.offset[d] + i) as u32));
                        }
                    }
                }
            }
        }
        for (k, &d) in g.tail_device.iter().enumerate() {
            let last = g.offset[d as usize] + trace.ops[d as usize].len() - 1;
            edges.push((last as u32, (g.ops + trace.transfers.len() + k) as u32));
        }
        let mut pred_start = vec![0u32; n + 1];
        for &(_, y) in &edges {
            pred_start[y as usize + 1] += 1;
        }
        for id in 0..n {
            pred_start[id + 1] += pred_start[id];
        }
        let mut fill = pred_start.clone();
        let mut preds = vec![0u32; edges.len()];
        for &(x, y) in &edges {
            preds[fill[y as usize] as usize] = x;
            fill[y as usize] += 1;
        }
        g.spans = spans;
        g.pred_start = pred_start;
        g.preds = preds;
        g
    }

    fn span(&self, id: usize) -> (u64, u64) {
        self.spans[id]
    }

    fn preds_of(&self, id: usize) -> &[u32] {
        &self.preds[self.pred_start[id] as usize..self.pred_start[id + 1] as usize]
    }

    fn len(&self) -> usize {
        self.ops + self.trace.transfers.len() + self.tail_device.len()
    }

    fn node(&self, id: usize) -> Node {
        if id < self.ops {
            let d = self.offset.partition_point(|&o| o <= id) - 1;
            Node::Op(d as u32, (id - self.offset[d]) as u32)
        } else if id < self.ops + self.trace.transfers.len() {
            Node::Transfer(id - self.ops)
        } else {
            Node::Tail(self.tail_device[id - self.ops - self.trace.transfers.len()])
        }
    }

    fn span_of(&self, id: usize) -> (u64, u64) {
        match self.node(id) {
            Node::Op(d, i) => {
                let r = &self.trace.ops[d as usize][i as usize];
                (r.start.as_ns(), r.end.as_ns())
            }
            Node::Transfer(t) => {
                let r = &self.trace.transfers[t];
                (r.start.as_ns(), r.end.as_ns())
            }
            Node::Tail(d) => {
                let last = self.trace.ops[d as usize].last().map_or(0, |r| r.end.as_ns());
                (last, self.trace.device_end[d as usize].as_ns())
            }
        }
    }

    /// Every node's latest finish (ns) that keeps the step's end.
    fn latest_finish(&self) -> Vec<u64> {
        let n = self.len();
        let step_end = self.trace.end().as_ns();
        let mut out_degree = vec![0u32; n];
        for &p in &self.preds {
            out_degree[p as usize] += 1;
        }
        let mut latest = vec![step_end; n];
        let mut ready: Vec<usize> = (0..n).filter(|&id| out_degree[id] == 0).collect();
        while let Some(y) = ready.pop() {
            let (start, end) = self.spans[y];
            let latest_start = latest[y].saturating_sub(end - start);
            for &x in self.preds_of(y) {
                let x = x as usize;
                latest[x] = latest[x].min(latest_start);
                out_degree[x] -= 1;
                if out_degree[x] == 0 {
                    ready.push(x);
                }
            }
        }
        latest
    }

    /// Each op's slack in ns, `slack[d][i]` for `trace.ops[d][i]`, and each
    /// pipeline transfer's.
    pub fn slack(&self) -> (Vec<Vec<u64>>, Vec<u64>) {
        let latest = self.latest_finish();
        let ops = self
            .trace
            .ops
            .iter()
            .enumerate()
            .map(|(d, recs)| {
                recs.iter().enumerate().map(|(i, r)| latest[self.offset[d] + i].saturating_sub(r.end.as_ns())).collect()
            })
            .collect();
        let transfers = self
            .trace
            .transfers
            .iter()
            .enumerate()
            .map(|(t, r)| latest[self.ops + t].saturating_sub(r.end.as_ns()))
            .collect();
        (ops, transfers)
    }

    /// The critical path, first link first.
    pub fn critical_path(&self) -> Vec<PathEntry> {
        let n = self.len();
        let t0 = self.trace.start().as_ns();
        let step_end = self.trace.end().as_ns();
        if n == 0 {
            return Vec::new();
        }
        let latest = self.latest_finish();
        let slack = |id: usize| latest[id].saturating_sub(self.span(id).1);
        let Some(mut x) = (0..n).find(|&id| self.span(id).1 == step_end && slack(id) == 0) else {
            return Vec::new();
        };
        let mut path = vec![self.entry(x)];
        loop {
            let (start, _) = self.span(x);
            let mut tight = None;
            let mut latest_pred: Option<usize> = None;
            // Prefer staying on the device (the op before), then the data.
            let same_device = match self.node(x) {
                Node::Op(_, i) if i > 0 => Some(x - 1),
                _ => None,
            };
            for &p in self.preds_of(x) {
                let p = p as usize;
                let end = self.span(p).1;
                if end == start && slack(p) == 0 && (tight.is_none() || Some(p) == same_device) {
                    tight = Some(p);
                }
                if latest_pred.is_none_or(|q| end > self.span(q).1) {
                    latest_pred = Some(p);
                }
            }
            let next = tight.or(latest_pred);
            let from = next.map_or(t0, |p| self.span(p).1);
            if from < start {
                // Nothing in the graph explains the wait: a collective.
                let device = path.last().map_or(0, |e| e.device);
                path.push(self.wait(device, from, start));
            }
            match next {
                Some(p) => {
                    path.push(self.entry(p));
                    x = p;
                }
                None => break,
            }
        }
        path.reverse();
        path
    }

    fn ms(&self, ns: u64) -> f64 {
        (ns - self.trace.start().as_ns()) as f64 / 1e6
    }

    fn wait(&self, device: u32, from: u64, to: u64) -> PathEntry {
        PathEntry {
            kind: "sync",
            device,
            micro_batch: None,
            stage: None,
            start_ms: self.ms(from),
            end_ms: self.ms(to),
            start_ns: from,
            end_ns: to,
            op: None,
            to_device: None,
            link: None,
        }
    }

    fn entry(&self, id: usize) -> PathEntry {
        let (start, end) = self.span(id);
        match self.node(id) {
            Node::Op(d, i) => {
                let r = &self.trace.ops[d as usize][i as usize];
                PathEntry {
                    kind: r.op.kind.as_str(),
                    device: d,
                    micro_batch: Some(r.op.micro_batch),
                    stage: Some(r.op.stage),
                    start_ms: self.ms(start),
                    end_ms: self.ms(end),
                    start_ns: start,
                    end_ns: end,
                    op: Some(r.op),
                    to_device: None,
                    link: None,
                }
            }
            Node::Transfer(t) => {
                let r = &self.trace.transfers[t];
                PathEntry {
                    kind: "send",
                    device: r.src,
                    micro_batch: Some(r.micro_batch),
                    stage: Some(r.from_stage),
                    start_ms: self.ms(start),
                    end_ms: self.ms(end),
                    start_ns: start,
                    end_ns: end,
                    op: None,
                    to_device: Some(r.dst),
                    link: r.bottleneck,
                }
            }
            Node::Tail(d) => self.wait(d, start, end),
        }
    }
}

/// The critical path as text: transfers and waits as links of their own,
/// runs of ops on one device compacted (`device 3: F0..F7, B0..B7 (112.4
/// ms)`).
pub fn render_text(trace: &Trace, path: &[PathEntry]) -> String {
    let shape = &trace.plan.shape;
    let total: u64 = path.iter().map(|e| e.end_ns - e.start_ns).sum();
    let mut parts: Vec<String> = Vec::new();
    let mut k = 0;
    while k < path.len() {
        let e = &path[k];
        if e.op.is_some() {
            let mut j = k;
            while j < path.len() && path[j].op.is_some() && path[j].device == e.device {
                j += 1;
            }
            let ops: Vec<Op> = path[k..j].iter().filter_map(|x| x.op).collect();
            let ns: u64 = path[k..j].iter().map(|x| x.end_ns - x.start_ns).sum();
            parts.push(format!("device {}: {} ({})", e.device, compact(&ops, shape), baton_engine::format_ns(ns)));
            k = j;
            continue;
        }
        let ns = e.end_ns - e.start_ns;
        let text = match e.kind {
            "send" => {
                let link = e
                    .link
                    .and_then(|l| trace.link_names.get(l as usize))
                    .map_or(String::new(), |n| format!("link {n}, "));
                format!(
                    "send {}->{} ({link}{})",
                    e.device,
                    e.to_device.unwrap_or(e.device),
                    baton_engine::format_ns(ns)
                )
            }
            _ => format!("sync on device {} ({})", e.device, baton_engine::format_ns(ns)),
        };
        parts.push(text);
        k += 1;
    }
    format!(
        "critical path ({} in {} links, each op, send and wait; a device's run of ops on one line):\n  {}\n",
        baton_engine::format_ns(total),
        path.len(),
        parts.join("\n  -> ")
    )
}

/// Ops grouped by kind and chunk in order of first appearance, runs of
/// consecutive micro-batches as ranges: `F0..F7, B0..B7`.
fn compact(ops: &[Op], shape: &baton_schedule::Shape) -> String {
    let mut groups: Vec<((OpKind, u32), Vec<u32>)> = Vec::new();
    for op in ops {
        let key = (op.kind, op.stage);
        match groups.iter_mut().find(|(k, _)| *k == key) {
            Some((_, v)) => v.push(op.micro_batch),
            None => groups.push((key, vec![op.micro_batch])),
        }
    }
    let mut out = Vec::new();
    for ((kind, stage), mbs) in groups {
        let token = |i: u32| baton_schedule::order_token(Op { kind, micro_batch: i, stage }, shape);
        let mut a = 0;
        while a < mbs.len() {
            let mut b = a;
            while b + 1 < mbs.len() && mbs[b + 1] == mbs[b] + 1 {
                b += 1;
            }
            out.push(if b > a { format!("{}..{}", token(mbs[a]), token(mbs[b])) } else { token(mbs[a]) });
            a = b + 1;
        }
    }
    out.join(", ")
}
