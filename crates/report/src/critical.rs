//! Why the step takes what it takes: the realised graph of a step, each
//! op's and transfer's slack, and the critical path.
//!
//! The graph is the step as it ran: a node per op (every device's ops,
//! device work included), per pipeline transfer, per gradient collective
//! (unless gradients are compressed: then encode and decode work
//! interleaves with a collective's transfers and the collectives are left
//! out), and, for a device whose step ends after its last op and its
//! collectives, a `sync` tail from that op's end to the device's end. A
//! node's predecessors are the op before it on its device, the transfer
//! that brought the data it needed from another device (the last rank's
//! share for a tensor group; data from a stage on the same device needs no
//! edge, the device's order implies it), with blocking sends the previous
//! op's transfer; a collective's are its group's previous collective and
//! what it waited for (the op during which a bucket became final, the
//! update, the tied pair's collective), and each member's update follows
//! it. An edge may carry a lag: a bucket final before its op's end lets
//! the collective start that much before the op ends. Durations are the
//! realised ones. A node's **slack** is how much later it could end without
//! moving the step's end, every other duration fixed: the latest finish
//! `LF(x) = min over successors y of (LF(y) - duration(y) - lag(x, y))`,
//! `LF = step end` for the last nodes, minus its end.
//!
//! The **critical path** walks back from a node that ends with the step
//! through predecessors that meet their successor exactly (end plus lag
//! equal to its start) and have no slack (the device's order first, then
//! the data); an op reached through a negative lag is cut at the instant
//! its bucket became final. When nothing explains a start (with compressed
//! gradients), the wait is a link of its own (`sync` with no piece). Its
//! links' durations add up to the step time exactly. Tensor all-reduces are
//! not nodes: a tensor op's time includes its all-reduces.

use baton_engine::SimTime;
use baton_executor::Trace;
use baton_schedule::{Op, OpKind};
use serde::Serialize;

/// One link of the critical path.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct PathEntry {
    /// As in the trace CSV: `forward`, `backward`, `weight`, `encode`,
    /// `update`, `send`, or `sync` (a gradient collective, with its bucket
    /// and piece; or, with no piece, a wait for the synchronisation that the
    /// graph does not explain).
    pub kind: &'static str,
    /// The device that ran it (a transfer's sender).
    pub device: u32,
    /// Its micro-batch (a collective's bucket; `null` for a wait).
    pub micro_batch: Option<u32>,
    /// Its virtual stage (a transfer's sending one, a collective's piece;
    /// `null` for a wait).
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
    /// The collective (index in `Trace::collectives`) a `sync` entry is.
    #[serde(skip)]
    pub(crate) collective: Option<u32>,
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
    /// Gradient collectives that are nodes (all of them, or none when
    /// gradients are compressed: encode and decode work interleaves with
    /// their transfers).
    colls: usize,
    /// The devices whose step ends after their last op and their
    /// collectives, one tail node each.
    tail_device: Vec<u32>,
    shares: usize,
    /// Every node's (start, end) in ns.
    spans: Vec<(u64, u64)>,
    /// Node `id`'s predecessors are `preds[pred_start[id]..pred_start[id + 1]]`
    /// (the op before on its device first when there is one).
    pred_start: Vec<u32>,
    preds: Vec<u32>,
    /// Per edge (aligned with `preds`): the successor may start `lag` ns
    /// after the predecessor's end (negative: a bucket final during the op).
    lags: Vec<i64>,
}

#[derive(Clone, Copy, Debug, PartialEq, Eq)]
enum Node {
    Op(u32, u32),
    Transfer(usize),
    Collective(usize),
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
        let shares = trace.tensor.max(1) as usize;
        let compressed = trace.ops.iter().flatten().any(|r| r.op.kind == OpKind::Encode);
        let colls = if compressed { 0 } else { trace.collectives.len() };
        // Each device's latest collective end (when collectives are nodes).
        let mut coll_end = vec![SimTime::ZERO; trace.ops.len()];
        for c in &trace.collectives[..colls] {
            for &w in &c.group {
                for k in 0..shares {
                    if let Some(e) = coll_end.get_mut(w as usize * shares + k) {
                        *e = (*e).max(c.end);
                    }
                }
            }
        }
        let mut tail_device = Vec::new();
        for (d, recs) in trace.ops.iter().enumerate() {
            let end = trace.device_end.get(d).copied().unwrap_or(SimTime::ZERO);
            if let Some(last) = recs.last() {
                if end > last.end.max(coll_end[d]) {
                    tail_device.push(d as u32);
                }
            }
        }
        let mut g = Graph {
            trace,
            offset,
            ops,
            colls,
            tail_device,
            shares,
            spans: Vec::new(),
            pred_start: Vec::new(),
            preds: Vec::new(),
            lags: Vec::new(),
        };
        let n = g.len();
        let spans: Vec<(u64, u64)> = (0..n).map(|id| g.span_of(id)).collect();
        // Edges (predecessor, node): each op after the one before it on its
        // device; each send after its producer, and its consumer after the
        // last share of it (a tensor group waits for every rank's share);
        // with blocking sends, an op after its device's previous send; a
        // tail after its device's last op. (Data between stages on the same
        // device needs no edge: the device's order already implies it.)
        let mut edges: Vec<(u32, u32, i64)> = Vec::with_capacity(2 * n);
        for (d, recs) in trace.ops.iter().enumerate() {
            for i in 1..recs.len() {
                let id = g.offset[d] + i;
                edges.push(((id - 1) as u32, id as u32, 0));
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
                edges.push(((g.offset[r.src as usize] + pi as usize) as u32, (g.ops + x) as u32, 0));
                let (_, ci) = trace.position_in(replica, r.consumer());
                edges.push(((g.ops + last) as u32, (g.offset[r.dst as usize] + ci as usize) as u32, 0));
            }
            k = end;
        }
        if trace.blocking_sends {
            for (d, recs) in trace.ops.iter().enumerate() {
                for i in 1..recs.len() {
                    if let Some(t) = trace.outgoing_index_in(replica_of(d as u32), recs[i - 1].op) {
                        let x = t + (d % shares);
                        if x < trace.transfers.len() {
                            edges.push(((g.ops + x) as u32, (g.offset[d] + i) as u32, 0));
                        }
                    }
                }
            }
        }
        g.collective_edges(&mut edges);
        for (k, &d) in g.tail_device.iter().enumerate() {
            let last = g.offset[d as usize] + trace.ops[d as usize].len() - 1;
            edges.push((last as u32, (g.ops + trace.transfers.len() + g.colls + k) as u32, 0));
        }
        let mut pred_start = vec![0u32; n + 1];
        for &(_, y, _) in &edges {
            pred_start[y as usize + 1] += 1;
        }
        for id in 0..n {
            pred_start[id + 1] += pred_start[id];
        }
        let mut fill = pred_start.clone();
        let mut preds = vec![0u32; edges.len()];
        let mut lags = vec![0i64; edges.len()];
        for &(x, y, lag) in &edges {
            preds[fill[y as usize] as usize] = x;
            lags[fill[y as usize] as usize] = lag;
            fill[y as usize] += 1;
        }
        g.spans = spans;
        g.pred_start = pred_start;
        g.preds = preds;
        g.lags = lags;
        g
    }

    /// Edges of the collectives: from the group's previous collective; from
    /// what each waited for (the op during which a bucket became final, with
    /// a negative lag when that was before the op's end; the update op, or
    /// the collective or op whose end let a zero-time update happen; the
    /// tied pair's collective); to each member's update.
    fn collective_edges(&self, edges: &mut Vec<(u32, u32, i64)>) {
        let trace = self.trace;
        let base = self.ops + trace.transfers.len();
        let shares = self.shares;
        let mut last_in_group: std::collections::HashMap<u32, usize> = Default::default();
        for (ci, c) in trace.collectives[..self.colls].iter().enumerate() {
            let id = (base + ci) as u32;
            if let Some(&prev) = last_in_group.get(&c.group_index) {
                edges.push(((base + prev) as u32, id, 0));
            }
            last_in_group.insert(c.group_index, ci);
            for w in &c.waited {
                match *w {
                    baton_executor::Waited::Gradient { worker, at } => {
                        let d = worker as usize * shares;
                        if let Some(i) = self.op_containing(d, at, |k| matches!(k, OpKind::Backward | OpKind::Weight)) {
                            let end = trace.ops[d][i].end.as_ns() as i64;
                            edges.push(((self.offset[d] + i) as u32, id, at.as_ns() as i64 - end));
                        }
                    }
                    baton_executor::Waited::Update { worker, at } => {
                        let d = worker as usize * shares;
                        let upd = self.op_containing(d, at, |k| k == OpKind::Update);
                        if let Some(i) = upd.filter(|&i| trace.ops[d][i].end == at) {
                            edges.push(((self.offset[d] + i) as u32, id, 0));
                        } else if let Some(k) = (0..ci).rev().find(|&k| {
                            let o = &trace.collectives[k];
                            o.end == at && o.phase != baton_executor::Phase::AllGather && o.group.contains(&worker)
                        }) {
                            edges.push(((base + k) as u32, id, 0));
                        } else if let Some(i) = self.op_containing(d, at, |k| !k.is_device_work()) {
                            if trace.ops[d][i].end == at {
                                edges.push(((self.offset[d] + i) as u32, id, 0));
                            }
                        }
                    }
                    baton_executor::Waited::Collective(k) => {
                        if (k as usize) < self.colls {
                            edges.push(((base + k as usize) as u32, id, 0));
                        }
                    }
                }
            }
            if c.phase != baton_executor::Phase::AllGather {
                for &w in &c.group {
                    for k in 0..shares {
                        let d = w as usize * shares + k;
                        let Some(recs) = trace.ops.get(d) else { continue };
                        let from = recs.partition_point(|r| r.start < c.end);
                        if let Some(i) = (from..recs.len()).find(|&i| recs[i].op.kind == OpKind::Update) {
                            edges.push((id, (self.offset[d] + i) as u32, 0));
                        }
                    }
                }
            }
        }
    }

    /// The last op on device `d` of a kind `want` accepts that runs at `at`
    /// (started by then and not ended before).
    fn op_containing(&self, d: usize, at: SimTime, want: impl Fn(OpKind) -> bool) -> Option<usize> {
        let recs = self.trace.ops.get(d)?;
        let mut i = recs.partition_point(|r| r.start <= at);
        while i > 0 {
            i -= 1;
            let r = &recs[i];
            if r.end < at {
                return None;
            }
            if want(r.op.kind) {
                return Some(i);
            }
        }
        None
    }

    fn span(&self, id: usize) -> (u64, u64) {
        self.spans[id]
    }

    fn preds_of(&self, id: usize) -> &[u32] {
        &self.preds[self.pred_start[id] as usize..self.pred_start[id + 1] as usize]
    }

    fn lags_of(&self, id: usize) -> &[i64] {
        &self.lags[self.pred_start[id] as usize..self.pred_start[id + 1] as usize]
    }

    fn len(&self) -> usize {
        self.ops + self.trace.transfers.len() + self.colls + self.tail_device.len()
    }

    fn node(&self, id: usize) -> Node {
        let transfers = self.trace.transfers.len();
        if id < self.ops {
            let d = self.offset.partition_point(|&o| o <= id) - 1;
            Node::Op(d as u32, (id - self.offset[d]) as u32)
        } else if id < self.ops + transfers {
            Node::Transfer(id - self.ops)
        } else if id < self.ops + transfers + self.colls {
            Node::Collective(id - self.ops - transfers)
        } else {
            Node::Tail(self.tail_device[id - self.ops - transfers - self.colls])
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
            Node::Collective(c) => {
                let r = &self.trace.collectives[c];
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
            for (&x, &lag) in self.preds_of(y).iter().zip(self.lags_of(y)) {
                let x = x as usize;
                latest[x] = latest[x].min((latest_start as i64 - lag).max(0) as u64);
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
            let mut tight: Option<(usize, i64)> = None;
            let mut latest_pred: Option<(usize, i64)> = None;
            // Prefer staying on the device (the op before), then the data.
            let same_device = match self.node(x) {
                Node::Op(_, i) if i > 0 => Some(x - 1),
                _ => None,
            };
            let avail = |p: usize, lag: i64| (self.span(p).1 as i64 + lag).max(0) as u64;
            for (&p, &lag) in self.preds_of(x).iter().zip(self.lags_of(x)) {
                let p = p as usize;
                let at = avail(p, lag);
                if at == start && slack(p) == 0 && (tight.is_none() || Some(p) == same_device) {
                    tight = Some((p, lag));
                }
                if latest_pred.is_none_or(|(q, l)| at > avail(q, l)) {
                    latest_pred = Some((p, lag));
                }
            }
            let next = tight.or(latest_pred);
            let from = next.map_or(t0, |(p, lag)| avail(p, lag));
            if from < start {
                // Nothing in the graph explains the wait: a collective.
                let device = path.last().map_or(0, |e| e.device);
                path.push(self.wait(device, from, start));
            }
            match next {
                Some((p, lag)) => {
                    let mut e = self.entry(p);
                    if lag < 0 {
                        // Only the part of the op before the bucket was final.
                        e.end_ns = from;
                        e.end_ms = self.ms(from);
                    }
                    path.push(e);
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
            collective: None,
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
                    collective: None,
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
                    collective: None,
                }
            }
            Node::Collective(c) => {
                let r = &self.trace.collectives[c];
                PathEntry {
                    kind: "sync",
                    device: r.group.first().map_or(0, |&w| w * self.shares as u32),
                    micro_batch: Some(r.bucket),
                    stage: Some(r.piece),
                    start_ms: self.ms(start),
                    end_ms: self.ms(end),
                    start_ns: start,
                    end_ns: end,
                    op: None,
                    to_device: None,
                    link: None,
                    collective: Some(c as u32),
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
            _ => match e.collective.and_then(|c| trace.collectives.get(c as usize)) {
                Some(c) => {
                    let t = trace.tensor.max(1);
                    let devices: Vec<String> = c.group.iter().map(|&w| (w * t).to_string()).collect();
                    let what = if c.phase == baton_executor::Phase::Tied {
                        c.phase.as_str().to_string()
                    } else {
                        format!("{} of piece {} bucket {}", c.phase.as_str(), c.piece, c.bucket)
                    };
                    format!(
                        "{what} among devices {} ({}, {})",
                        devices.join(", "),
                        c.algorithm.name(),
                        baton_engine::format_ns(ns)
                    )
                }
                None => format!("sync on device {} ({})", e.device, baton_engine::format_ns(ns)),
            },
        };
        parts.push(text);
        k += 1;
    }
    format!(
        "critical path ({} in {} links, each op, send, collective and wait; a device's run of ops on one line):\n  {}\n",
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
