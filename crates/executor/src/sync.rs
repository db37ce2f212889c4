//! Gradient synchronisation across data-parallel replicas.
//!
//! The devices holding the same piece (one per replica) form a group; a
//! piece's layers are cut into buckets. A bucket is ready on a worker when
//! its share of the piece's last gradient op has run (or, without overlap,
//! when the worker's last gradient op ends); once it is ready on every
//! member, the bucket's collective joins its group's queue. A group runs one
//! collective at a time, the earliest ready first (equal times: piece order,
//! then bucket order), each played as the dependent point-to-point transfers
//! of its `baton-collective` graph on the shared network. With compression
//! every member encodes before and decodes after (device work of kind
//! `encode`); a worker whose gradients are all reduced runs its optimizer
//! update (kind `update`); with sharded state the updated weights are then
//! all-gathered.
//!
//! Tied embeddings: the two devices holding the first and last piece of a
//! replica all-reduce the tied weights' gradient first, and the
//! data-parallel collective of a bucket holding a tied layer waits for it.

use std::collections::{BTreeSet, HashMap};
use std::rc::Rc;

use baton_collective::{build, Algorithm, Goal, Graph, Servers};
use baton_engine::{SimDuration, SimTime};
use baton_schedule::{Op, OpKind, Plan};

use crate::{Event, ExecError, Executor, Sched, Work, SYNC_BIT};

/// One bucket of a piece's gradient.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct BucketSpec {
    /// Dense gradient bytes per member.
    pub bytes: u64,
    /// Bytes of the updated weights all-gathered after a sharded update.
    pub gather_bytes: u64,
    /// The bucket is final `ready_num / ready_den` of the way through the
    /// piece's last gradient op (the last bucket: 1/1).
    pub ready_num: u64,
    /// See `ready_num` (positive).
    pub ready_den: u64,
    /// With tensor parallelism: the segment of the piece's last gradient op
    /// after which the bucket is final (its layers' backward segments have
    /// run); `None` without.
    pub ready_segment: Option<u32>,
}

/// How gradients are compressed on the wire.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum Compression {
    /// `bits` per element instead of `bytes_per_param * 8`.
    Quantize {
        /// Bits per element on the wire.
        bits: u32,
    },
    /// The largest `keep` fraction of elements, each sent as its value and a
    /// 4-byte index, exchanged as an all-gather.
    TopK {
        /// Fraction of elements kept, in (0, 1].
        keep: f64,
    },
}

/// The tied embedding's gradient, summed between the device of a replica's
/// first piece and the device of the piece holding the tied copy.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct TiedSpec {
    /// Dense gradient bytes of the tied weights.
    pub bytes: u64,
    /// The bucket of the first piece holding the first layer.
    pub first_bucket: u32,
    /// The piece holding the tied copy (usually the last).
    pub piece: u32,
    /// The bucket of `piece` holding the tied layer.
    pub piece_bucket: u32,
}

/// How a data-parallel step synchronises its gradients.
#[derive(Clone, Debug, PartialEq)]
pub struct SyncConfig {
    /// Replicas d of the pipeline.
    pub replicas: u32,
    /// The algorithm each group uses.
    pub algorithm: Algorithm,
    /// Parameter servers (parameter-server algorithm only); dedicated servers
    /// are topology devices `d * p ..`.
    pub servers: Servers,
    /// Whether buckets start during the last backward (true) or after the
    /// worker's last gradient op (false).
    pub overlap: bool,
    /// Per virtual stage: its buckets, last layer's first.
    pub buckets: Vec<Vec<BucketSpec>>,
    /// Gradient element size on the wire before compression.
    pub bytes_per_param: u32,
    /// Compression of gradients, if any.
    pub compression: Option<Compression>,
    /// Encode (and decode) speed in dense bytes per second.
    pub encode_bytes_per_s: u64,
    /// Sharded optimizer state: reduce-scatter, update, all-gather.
    pub shard: bool,
    /// Optimizer update time per worker (already divided by d when sharded).
    pub update: SimDuration,
    /// The tied embedding's all-reduce, when the first and last pieces sit on
    /// different devices.
    pub tied: Option<TiedSpec>,
    /// Node of every topology device (workers, then dedicated servers), for
    /// the hierarchical algorithm.
    pub nodes: Vec<u32>,
}

impl SyncConfig {
    /// Topology devices beyond the replicas' workers.
    pub fn dedicated_servers(&self) -> u32 {
        if self.algorithm == Algorithm::ParameterServer && self.servers.dedicated && self.replicas > 1 {
            self.servers.count
        } else {
            0
        }
    }
}

/// What a collective does.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum Phase {
    /// The tied embedding's gradient between a replica's first and last
    /// pieces.
    Tied,
    /// A bucket's gradient summed over the replicas.
    AllReduce,
    /// A bucket's gradient summed over the replicas, each keeping its shard.
    ReduceScatter,
    /// The updated weights of a bucket gathered from their shards.
    AllGather,
}

impl Phase {
    /// The name used in reports.
    pub fn as_str(self) -> &'static str {
        match self {
            Phase::Tied => "tied all-reduce",
            Phase::AllReduce => "all-reduce",
            Phase::ReduceScatter => "reduce-scatter",
            Phase::AllGather => "all-gather",
        }
    }
}

/// One collective as it ran.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct CollectiveRecord {
    /// Its group's index (groups 0..p: the replicas' devices of pipeline
    /// device d; then one tied pair per replica).
    pub group_index: u32,
    /// The members (workers: tensor groups), in ring order.
    pub group: Vec<u32>,
    /// Devices per tensor group: the collective ran once per rank `k`,
    /// among devices `member * ranks + k`.
    pub ranks: u32,
    /// Dedicated servers' topology devices.
    pub servers: Vec<u32>,
    /// The piece (virtual stage) whose gradient it carries.
    pub piece: u32,
    /// The bucket within the piece.
    pub bucket: u32,
    /// What it does.
    pub phase: Phase,
    /// The algorithm.
    pub algorithm: Algorithm,
    /// Dense bytes per member.
    pub bytes: u64,
    /// Bytes each member's device sent (per rank), after compression,
    /// aligned with `group`.
    pub wire_bytes_sent: Vec<u64>,
    /// Bytes each dedicated server sent (for every rank), aligned with
    /// `servers`.
    pub server_bytes_sent: Vec<u64>,
    /// Logical rounds of its transfers.
    pub rounds: u32,
    /// What it waited for before it could start, in the order each came
    /// (its group's previous collective, which it also waits for, is not
    /// listed: see `group_index`).
    pub waited: Vec<Waited>,
    /// When it started (ready on every member and its group free).
    pub start: SimTime,
    /// When its last transfer arrived (and, compressed, its last decode ended).
    pub end: SimTime,
}

/// One condition a collective waited for.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Waited {
    /// A bucket became final on `worker` at `at` (during or at the end of
    /// its last gradient op of the piece, or of one of its segments).
    Gradient {
        /// The worker.
        worker: u32,
        /// When.
        at: SimTime,
    },
    /// `worker`'s optimizer update was done at `at` (its update op's end, or
    /// at once when updates take no time).
    Update {
        /// The worker.
        worker: u32,
        /// When.
        at: SimTime,
    },
    /// Another collective (index in `Trace::collectives`) ended.
    Collective(u32),
}

/// One point-to-point transfer of a collective.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct SyncTransferRecord {
    /// Index of its collective in `Trace::collectives`.
    pub collective: u32,
    /// Its round within the collective.
    pub round: u32,
    /// Sending topology device (a worker or a dedicated server).
    pub src: u32,
    /// Receiving topology device.
    pub dst: u32,
    /// Bytes carried.
    pub bytes: u64,
    /// When the data it carries existed and the send began.
    pub start: SimTime,
    /// Last byte left the sender.
    pub sent: SimTime,
    /// Data arrived.
    pub end: SimTime,
    /// The link that held it back the longest, if it shared a finite link.
    pub bottleneck: Option<u32>,
}

/// What follows a piece of device work.
#[derive(Clone, Copy, Debug)]
pub(crate) enum Then {
    /// Member `member` of collective `coll` has encoded its data.
    Encoded { coll: u32, member: u32 },
    /// A member of collective `coll` has decoded.
    Decoded { coll: u32 },
    /// The worker's optimizer update is done.
    Updated,
    /// The worker's update at the end of one of several steps is done
    /// (nothing waits for it but the worker's next op).
    StepUpdated,
}

/// A collective graph with what playing it needs.
pub(crate) struct Prepared {
    pub(crate) graph: Graph,
    /// Per transfer: the transfers that wait for it.
    pub(crate) dependents: Vec<Vec<u32>>,
    /// Per participant: the transfers it sends.
    by_sender: Vec<Vec<u32>>,
}

impl Prepared {
    /// Transfer `i` has arrived: counts it off the transfers that wait for
    /// it (their places in `remaining` offset by `base`) and returns those
    /// that wait for nothing more.
    pub(crate) fn release(&self, base: u32, i: u32, remaining: &mut [u32]) -> Vec<u32> {
        let mut ready = Vec::new();
        for &n in &self.dependents[i as usize] {
            let n = base + n;
            remaining[n as usize] -= 1;
            if remaining[n as usize] == 0 {
                ready.push(n);
            }
        }
        ready
    }

    pub(crate) fn new(graph: Graph) -> Self {
        let n = graph.transfers().len();
        let mut dependents = vec![Vec::new(); n];
        let mut by_sender = vec![Vec::new(); graph.participants as usize];
        for t in 0..n {
            for &d in graph.deps(t) {
                dependents[d as usize].push(t as u32);
            }
            by_sender[graph.transfers()[t].from as usize].push(t as u32);
        }
        Prepared { graph, dependents, by_sender }
    }
}

/// A running collective: one copy of its graph per tensor rank, side by
/// side (the ranks of a group each sum their share of the gradient with the
/// same ranks of the other replicas); transfer `offset[c] + i` is transfer
/// `i` of copy `c`.
struct Running {
    copies: Vec<Rc<Prepared>>,
    offset: Vec<u32>,
    /// Per copy: participant -> topology device.
    devices: Vec<Vec<u32>>,
    /// Per transfer (over all copies): what it still waits for.
    remaining: Vec<u32>,
    /// Transfers not yet arrived.
    left: u32,
    /// Decodes not yet done.
    decodes_left: u32,
    compressed: bool,
}

struct Group {
    members: Vec<u32>,
    /// Ready collectives: (ready at, piece, bucket, phase).
    pending: BTreeSet<(SimTime, u32, u32, Phase)>,
    busy: bool,
    algorithm: Algorithm,
    servers: Servers,
}

/// What a step's synchronisation leaves in the trace: the collectives, their
/// transfers, and each worker's last collective.
pub(crate) type Finished = (Vec<CollectiveRecord>, Vec<SyncTransferRecord>, Vec<Option<u32>>);

type GraphKey = (Algorithm, Goal, u64, Vec<u32>, Servers);

pub(crate) struct State {
    cfg: SyncConfig,
    d: u32,
    p: u32,
    /// Devices per tensor group: each collective runs once per rank.
    t: u32,
    last_piece: u32,
    /// First global bucket of each piece (one extra entry at the end).
    bucket_base: Vec<u32>,
    nb: u32,
    groups: Vec<Group>,
    /// Conditions left per slot: all-reduce / reduce-scatter per global
    /// bucket, then all-gather per global bucket, then tied per replica.
    slot_left: Vec<u32>,
    /// Per slot: the conditions met so far.
    slot_waited: Vec<Vec<Waited>>,
    /// Per pipeline device: (index in its order, piece) of each piece's last
    /// gradient op, in order.
    grad_final: Vec<Vec<(usize, u32)>>,
    /// Per worker: position in `grad_final`.
    cursor: Vec<usize>,
    /// Per worker: the piece whose last gradient op it runs as segments.
    segmented: Vec<Option<u32>>,
    /// Per worker: reducing collectives (tied, all-reduce, reduce-scatter)
    /// not yet ended.
    reduce_left: Vec<u32>,
    compute_done: Vec<bool>,
    update_started: Vec<bool>,
    running: Vec<Option<Running>>,
    pub(crate) records: Vec<CollectiveRecord>,
    pub(crate) transfers: Vec<SyncTransferRecord>,
    /// Per sync transfer: its transfer index in its collective's graph.
    graph_transfer: Vec<u32>,
    last_collective: Vec<Option<u32>>,
    cache: HashMap<GraphKey, Rc<Prepared>>,
    fault: Option<ExecError>,
}

const NEVER: u32 = u32::MAX;

impl State {
    pub(crate) fn new(cfg: &SyncConfig, plan: &Plan, pieces: usize, t: u32) -> Result<State, ExecError> {
        let shape = plan.shape;
        let p = shape.stages;
        let d = cfg.replicas.max(1);
        if cfg.buckets.len() != pieces {
            return Err(ExecError::Sync(format!("{} bucket lists for {pieces} pieces", cfg.buckets.len())));
        }
        if cfg.buckets.iter().flatten().any(|b| b.ready_den == 0 || b.ready_num > b.ready_den) {
            return Err(ExecError::Sync("a bucket's ready fraction is not within 0..=1".into()));
        }
        if cfg.compression.is_some() && cfg.encode_bytes_per_s == 0 {
            return Err(ExecError::Sync("compression needs a positive encode rate".into()));
        }
        let workers = (p * d) as usize;
        if cfg.nodes.len() < workers * t as usize + cfg.dedicated_servers() as usize {
            return Err(ExecError::Sync("a node is needed for every device".into()));
        }
        let mut bucket_base = Vec::with_capacity(pieces + 1);
        let mut nb = 0u32;
        for b in &cfg.buckets {
            bucket_base.push(nb);
            nb += b.len() as u32;
        }
        bucket_base.push(nb);
        let last_piece = pieces as u32 - 1;
        let tied = cfg.tied.filter(|t| (t.piece as usize) < pieces && shape.device_of(0) != shape.device_of(t.piece));
        if let Some(t) = tied {
            if t.first_bucket as usize >= cfg.buckets[0].len()
                || t.piece_bucket as usize >= cfg.buckets[t.piece as usize].len()
            {
                return Err(ExecError::Sync("the tied layer's bucket does not exist".into()));
            }
        }
        let mut groups: Vec<Group> = (0..p)
            .map(|dev| Group {
                members: (0..d).map(|r| r * p + dev).collect(),
                pending: BTreeSet::new(),
                busy: false,
                algorithm: cfg.algorithm,
                servers: cfg.servers,
            })
            .collect();
        if tied.is_some() {
            // The pair's two-member form of the algorithm; a parameter server
            // becomes the first device's own (colocated, one server).
            for r in 0..d {
                groups.push(Group {
                    members: vec![r * p + shape.device_of(0), r * p + shape.device_of(tied.map_or(0, |t| t.piece))],
                    pending: BTreeSet::new(),
                    busy: false,
                    algorithm: cfg.algorithm,
                    servers: Servers { count: 1, dedicated: false },
                });
            }
        }
        let mut slot_left = vec![NEVER; (2 * nb + d) as usize];
        let is_tied_bucket = |gb: u32| {
            tied.is_some_and(|t| {
                gb == bucket_base[0] + t.first_bucket || gb == bucket_base[t.piece as usize] + t.piece_bucket
            })
        };
        if d > 1 {
            for gb in 0..nb {
                slot_left[gb as usize] = if is_tied_bucket(gb) { 2 * d } else { d };
                if cfg.shard {
                    slot_left[(nb + gb) as usize] = d;
                }
            }
        }
        if tied.is_some() {
            for r in 0..d {
                slot_left[(2 * nb + r) as usize] = 2;
            }
        }
        // Each piece's last gradient op on its device.
        let final_kind = if shape.split_backward { OpKind::Weight } else { OpKind::Backward };
        let grad_final = plan
            .per_device
            .iter()
            .map(|ops| {
                let mut last: Vec<(usize, u32)> = Vec::new();
                for (i, op) in ops.iter().enumerate() {
                    if op.kind == final_kind {
                        match last.iter_mut().find(|(_, s)| *s == op.stage) {
                            Some(e) => e.0 = i,
                            None => last.push((i, op.stage)),
                        }
                    }
                }
                last.sort_unstable();
                last
            })
            .collect();
        let mut reduce_left = vec![0u32; workers];
        for w in 0..workers as u32 {
            let dev = w % p;
            if d > 1 {
                let pieces_here = (0..pieces as u32).filter(|&s| shape.device_of(s) == dev);
                reduce_left[w as usize] = pieces_here.map(|s| cfg.buckets[s as usize].len() as u32).sum();
            }
            if tied.is_some_and(|t| dev == shape.device_of(0) || dev == shape.device_of(t.piece)) {
                reduce_left[w as usize] += 1;
            }
        }
        let mut state = State {
            cfg: SyncConfig { tied, ..cfg.clone() },
            d,
            p,
            t,
            last_piece,
            bucket_base,
            nb,
            groups,
            slot_waited: vec![Vec::new(); slot_left.len()],
            slot_left,
            grad_final,
            cursor: vec![0; workers],
            segmented: vec![None; workers],
            reduce_left,
            compute_done: vec![false; workers],
            update_started: vec![false; workers],
            running: Vec::new(),
            records: Vec::new(),
            transfers: Vec::new(),
            graph_transfer: Vec::new(),
            last_collective: vec![None; workers],
            cache: HashMap::new(),
            fault: None,
        };
        // Refuse a group the algorithm cannot serve before the step starts.
        for g in 0..state.groups.len() {
            if state.groups[g].members.len() < 2 {
                continue;
            }
            let goals: &[Goal] = if state.cfg.shard && g < p as usize {
                &[Goal::ReduceScatter, Goal::AllGather]
            } else {
                &[Goal::AllReduce]
            };
            for &goal in goals {
                for rank in 0..t {
                    state.graph(g, goal, 0, rank)?;
                }
                // Only the check was wanted: keep no empty graph around.
                state.cache.clear();
            }
        }
        Ok(state)
    }

    fn piece_of(&self, gb: u32) -> u32 {
        (self.bucket_base.partition_point(|&b| b <= gb) - 1) as u32
    }

    fn graph(&mut self, g: usize, goal: Goal, bytes: u64, rank: u32) -> Result<Rc<Prepared>, ExecError> {
        let group = &self.groups[g];
        let t = self.t;
        // Nodes relabelled by first appearance, so equal shapes share a graph.
        let mut seen: Vec<u32> = Vec::new();
        let nodes: Vec<u32> = group
            .members
            .iter()
            .map(|&m| {
                let n = self.cfg.nodes[(m * t + rank) as usize];
                match seen.iter().position(|&x| x == n) {
                    Some(i) => i as u32,
                    None => {
                        seen.push(n);
                        (seen.len() - 1) as u32
                    }
                }
            })
            .collect();
        let key = (group.algorithm, goal, bytes, nodes, group.servers);
        if let Some(p) = self.cache.get(&key) {
            return Ok(p.clone());
        }
        let graph = build(key.0, goal, &key.3, bytes, key.4)?;
        let prepared = Rc::new(Prepared::new(graph));
        self.cache.insert(key, prepared.clone());
        Ok(prepared)
    }

    /// One condition of `slot` is met at `now`.
    fn satisfy(&mut self, slot: u32, now: SimTime, why: Waited) {
        let left = &mut self.slot_left[slot as usize];
        if *left == NEVER || *left == 0 {
            return;
        }
        *left -= 1;
        self.slot_waited[slot as usize].push(why);
        if *left > 0 {
            return;
        }
        let (group, piece, bucket, phase) = if slot >= 2 * self.nb {
            (self.p + (slot - 2 * self.nb), 0, 0, Phase::Tied)
        } else {
            let (gb, phase) = if slot >= self.nb {
                (slot - self.nb, Phase::AllGather)
            } else {
                (slot, if self.cfg.shard { Phase::ReduceScatter } else { Phase::AllReduce })
            };
            let piece = self.piece_of(gb);
            (piece % self.p, piece, gb - self.bucket_base[piece as usize], phase)
        };
        self.groups[group as usize].pending.insert((now, piece, bucket, phase));
    }

    pub(crate) fn finish(self, workers: usize) -> Result<Finished, ExecError> {
        if let Some(e) = self.fault {
            return Err(e);
        }
        if let Some(g) = self.groups.iter().position(|g| g.busy || !g.pending.is_empty()) {
            return Err(ExecError::Sync(format!("the step ended with group {g}'s collectives unfinished")));
        }
        if let Some(w) = (0..workers).find(|&w| self.reduce_left[w] > 0) {
            return Err(ExecError::Sync(format!("the step ended with device {w}'s gradients unsynchronised")));
        }
        Ok((self.records, self.transfers, self.last_collective))
    }
}

impl Executor<'_> {
    fn state(&mut self) -> &mut State {
        self.sync.as_mut().expect("called only with synchronisation")
    }

    /// A plan op started on worker `w`: if it is a piece's last gradient op
    /// and buckets overlap, each of the piece's buckets becomes ready at its
    /// share of the op's time.
    pub(crate) fn sync_op_started(
        &mut self,
        w: usize,
        index: usize,
        now: SimTime,
        dur: Option<SimDuration>,
        sched: &mut Sched,
    ) {
        let p = self.p;
        let st = self.state();
        let list = &st.grad_final[w % p];
        let Some(&(i, piece)) = list.get(st.cursor[w]) else { return };
        if i != index || !st.cfg.overlap {
            return;
        }
        // A tensor-parallel op has no time known in advance: its buckets
        // become final as its segments end (sync_segment_done).
        let Some(dur) = dur else {
            st.segmented[w] = Some(piece);
            return;
        };
        let base = st.bucket_base[piece as usize];
        let mirrors = self.mirrors(w);
        let st = self.state();
        for (b, spec) in st.cfg.buckets[piece as usize].iter().enumerate() {
            let share = (u128::from(dur.as_ns()) * u128::from(spec.ready_num)).div_ceil(u128::from(spec.ready_den));
            let at = now + SimDuration(share as u64);
            for &m in &mirrors {
                sched.schedule(at, Event::BucketReady { worker: m as u32, bucket: base + b as u32 });
            }
        }
    }

    /// Segment `segment` of worker `w`'s tensor-parallel op has ended: the
    /// buckets final after it, if the op is its piece's last gradient op.
    pub(crate) fn sync_segment_done(&mut self, w: usize, segment: u32, sched: &mut Sched) {
        let st = self.state();
        let Some(piece) = st.segmented[w] else { return };
        let base = st.bucket_base[piece as usize];
        let ready: Vec<u32> = st.cfg.buckets[piece as usize]
            .iter()
            .enumerate()
            .filter(|(_, b)| b.ready_segment == Some(segment))
            .map(|(b, _)| base + b as u32)
            .collect();
        for m in self.mirrors(w) {
            for &gb in &ready {
                self.bucket_ready(m as u32, gb, sched);
            }
        }
    }

    /// A plan op ended on worker `w`.
    pub(crate) fn sync_op_done(&mut self, w: usize, index: usize, sched: &mut Sched) {
        let p = self.p;
        let len = self.plan.per_device[w % p].len();
        let st = self.state();
        let list = &st.grad_final[w % p];
        if let Some(&(i, _)) = list.get(st.cursor[w]) {
            if i == index {
                st.segmented[w] = None;
                st.cursor[w] += 1;
                // Without overlap every bucket of the worker is ready when its
                // last gradient op ends.
                if !st.cfg.overlap && st.cursor[w] == list.len() {
                    let buckets: Vec<u32> = list
                        .iter()
                        .flat_map(|&(_, s)| st.bucket_base[s as usize]..st.bucket_base[s as usize + 1])
                        .collect();
                    for m in self.mirrors(w) {
                        for &gb in &buckets {
                            self.bucket_ready(m as u32, gb, sched);
                        }
                    }
                }
            }
        }
        if index + 1 == len {
            for m in self.mirrors(w) {
                self.state().compute_done[m] = true;
                self.maybe_update(m, sched);
            }
        }
    }

    /// Worker `w` and the workers that mirror it (the same pipeline device
    /// of every other replica, when only replica 0 plays).
    fn mirrors(&self, w: usize) -> Vec<usize> {
        if self.playing == self.next.len() {
            return vec![w];
        }
        (0..self.next.len() / self.p).map(|r| r * self.p + w).collect()
    }

    /// Bucket `gb` is final on worker `w`.
    pub(crate) fn bucket_ready(&mut self, w: u32, gb: u32, sched: &mut Sched) {
        let now = sched.now();
        let st = self.state();
        let (d, p) = (st.d, st.p);
        let why = Waited::Gradient { worker: w, at: now };
        if d > 1 {
            st.satisfy(gb, now, why);
        }
        if let Some(t) = st.cfg.tied {
            let r = w / p;
            if gb == st.bucket_base[0] + t.first_bucket || gb == st.bucket_base[t.piece as usize] + t.piece_bucket {
                st.satisfy(2 * st.nb + r, now, why);
            }
        }
    }

    /// Starts, in every idle group, the earliest ready collective.
    pub(crate) fn start_ready_collectives(&mut self, sched: &mut Sched) {
        let n = self.state().groups.len();
        for g in 0..n {
            let group = &mut self.state().groups[g];
            if group.busy {
                continue;
            }
            let Some((_, piece, bucket, phase)) = group.pending.pop_first() else { continue };
            group.busy = true;
            self.start_collective(g, piece, bucket, phase, sched);
        }
    }

    fn start_collective(&mut self, g: usize, piece: u32, bucket: u32, phase: Phase, sched: &mut Sched) {
        let now = sched.now();
        let st = self.state();
        let members = st.groups[g].members.clone();
        let m = members.len() as u64;
        let dense = match phase {
            Phase::Tied => st.cfg.tied.map_or(0, |t| t.bytes),
            Phase::AllGather => st.cfg.buckets[piece as usize][bucket as usize].gather_bytes,
            Phase::AllReduce | Phase::ReduceScatter => st.cfg.buckets[piece as usize][bucket as usize].bytes,
        };
        let bpp = u64::from(st.cfg.bytes_per_param.max(1));
        let compression = if phase == Phase::AllGather { None } else { st.cfg.compression };
        let (goal, wire) = match (phase, compression) {
            (Phase::AllGather, _) => (Goal::AllGather, dense),
            (Phase::ReduceScatter, Some(Compression::Quantize { bits })) => {
                (Goal::ReduceScatter, (u128::from(dense) * u128::from(bits)).div_ceil(u128::from(8 * bpp)) as u64)
            }
            (Phase::ReduceScatter, _) => (Goal::ReduceScatter, dense),
            (_, Some(Compression::Quantize { bits })) => {
                (Goal::AllReduce, (u128::from(dense) * u128::from(bits)).div_ceil(u128::from(8 * bpp)) as u64)
            }
            (_, Some(Compression::TopK { keep })) => {
                let kept = ((dense / bpp) as f64 * keep).ceil() as u64;
                (Goal::AllGather, kept.saturating_mul(bpp + 4).saturating_mul(m))
            }
            (_, None) => (Goal::AllReduce, dense),
        };
        let t = st.t;
        let mut copies = Vec::with_capacity(t as usize);
        for rank in 0..t {
            match st.graph(g, goal, wire, rank) {
                Ok(p) => copies.push(p),
                Err(e) => {
                    st.fault.get_or_insert(e);
                    return;
                }
            }
        }
        let graph = &copies[0].graph;
        let servers_first = st.d * st.p * t;
        let extra = graph.participants - graph.members;
        let devices: Vec<Vec<u32>> = (0..t)
            .map(|c| members.iter().map(|&m| m * t + c).chain((0..extra).map(|k| servers_first + k)).collect())
            .collect();
        let sent = graph.sent_bytes();
        let coll = st.records.len() as u32;
        let slot = match phase {
            Phase::Tied => 2 * st.nb + (g as u32 - st.p),
            Phase::AllGather => st.nb + st.bucket_base[piece as usize] + bucket,
            Phase::AllReduce | Phase::ReduceScatter => st.bucket_base[piece as usize] + bucket,
        };
        let waited = std::mem::take(&mut st.slot_waited[slot as usize]);
        st.records.push(CollectiveRecord {
            group_index: g as u32,
            group: members.clone(),
            ranks: t,
            servers: devices[0][members.len()..].to_vec(),
            piece,
            bucket,
            phase,
            algorithm: graph.algorithm,
            bytes: dense,
            wire_bytes_sent: sent[..members.len()].to_vec(),
            server_bytes_sent: sent[members.len()..].iter().map(|&b| b * t as u64).collect(),
            rounds: graph.rounds,
            waited,
            start: now,
            end: now,
        });
        let compressed = compression.is_some();
        let mut offset = Vec::with_capacity(t as usize + 1);
        let mut remaining = Vec::new();
        for p in &copies {
            offset.push(remaining.len() as u32);
            let g = &p.graph;
            for (i, tr) in g.transfers().iter().enumerate() {
                remaining.push(g.deps(i).len() as u32 + u32::from(compressed && tr.from < g.members));
            }
        }
        offset.push(remaining.len() as u32);
        let left = remaining.len() as u32;
        let rate = st.cfg.encode_bytes_per_s.max(1);
        st.running.resize_with(coll as usize + 1, || None);
        let ready: Vec<u32> = (0..left).filter(|&i| remaining[i as usize] == 0).collect();
        st.running[coll as usize] =
            Some(Running { copies, offset, devices, remaining, left, decodes_left: 0, compressed });
        if compressed {
            let dur = SimDuration((u128::from(dense) * 1_000_000_000).div_ceil(u128::from(rate)) as u64);
            let op = Op { kind: OpKind::Encode, micro_batch: bucket, stage: piece };
            for (i, &w) in members.iter().enumerate() {
                self.work[w as usize].push_back(Work {
                    op,
                    duration: dur,
                    then: Then::Encoded { coll, member: i as u32 },
                });
                self.try_start(w as usize, sched);
            }
        }
        for i in ready {
            self.start_sync_transfer(coll, i, now);
        }
        if left == 0 {
            self.transfers_done(coll, sched);
        }
    }

    /// Starts transfer `idx` (over all copies) of collective `coll`.
    fn start_sync_transfer(&mut self, coll: u32, idx: u32, now: SimTime) {
        let st = self.sync.as_mut().expect("sync");
        let run = st.running[coll as usize].as_ref().expect("running");
        let c = run.offset.partition_point(|&o| o <= idx) - 1;
        let tr = run.copies[c].graph.transfers()[(idx - run.offset[c]) as usize];
        let (src, dst) = (run.devices[c][tr.from as usize], run.devices[c][tr.to as usize]);
        let i = st.transfers.len() as u32;
        st.transfers.push(SyncTransferRecord {
            collective: coll,
            round: tr.round,
            src,
            dst,
            bytes: tr.bytes,
            start: now,
            sent: now,
            end: now,
            bottleneck: None,
        });
        st.graph_transfer.push(idx);
        self.transfers.start(now, src, dst, tr.bytes, i | SYNC_BIT);
    }

    pub(crate) fn sync_arrival(&mut self, i: u32, sched: &mut Sched) {
        let now = sched.now();
        let st = self.state();
        let rec = &mut st.transfers[i as usize];
        rec.end = now;
        let coll = rec.collective;
        let idx = st.graph_transfer[i as usize];
        let run = st.running[coll as usize].as_mut().expect("running");
        run.left -= 1;
        let c = run.offset.partition_point(|&o| o <= idx) - 1;
        let (base, prepared) = (run.offset[c], run.copies[c].clone());
        let ready = prepared.release(base, idx - base, &mut run.remaining);
        let done = run.left == 0;
        for n in ready {
            self.start_sync_transfer(coll, n, now);
        }
        if done {
            self.transfers_done(coll, sched);
        }
    }

    fn transfers_done(&mut self, coll: u32, sched: &mut Sched) {
        let st = self.state();
        let run = st.running[coll as usize].as_mut().expect("running");
        if !run.compressed {
            self.collective_end(coll, sched);
            return;
        }
        let rec = &st.records[coll as usize];
        let members = rec.group.clone();
        run.decodes_left = members.len() as u32;
        let rate = st.cfg.encode_bytes_per_s.max(1);
        let dur = SimDuration((u128::from(rec.bytes) * 1_000_000_000).div_ceil(u128::from(rate)) as u64);
        let op = Op { kind: OpKind::Encode, micro_batch: rec.bucket, stage: rec.piece };
        for w in members {
            self.work[w as usize].push_back(Work { op, duration: dur, then: Then::Decoded { coll } });
            self.try_start(w as usize, sched);
        }
    }

    fn collective_end(&mut self, coll: u32, sched: &mut Sched) {
        let now = sched.now();
        let st = self.state();
        st.running[coll as usize] = None;
        let rec = &mut st.records[coll as usize];
        rec.end = now;
        let (g, phase, members) = (rec.group_index as usize, rec.phase, rec.group.clone());
        st.groups[g].busy = false;
        for &w in &members {
            st.last_collective[w as usize] = Some(coll);
        }
        if phase == Phase::Tied {
            // The data-parallel collectives of the tied buckets wait for this.
            if let Some(t) = st.cfg.tied {
                if st.d > 1 {
                    let a = st.bucket_base[0] + t.first_bucket;
                    let b = st.bucket_base[t.piece as usize] + t.piece_bucket;
                    st.satisfy(a, now, Waited::Collective(coll));
                    st.satisfy(b, now, Waited::Collective(coll));
                }
            }
        }
        for &w in &members {
            self.device_end[w as usize] = self.device_end[w as usize].max(now);
        }
        if phase != Phase::AllGather {
            for w in members {
                let st = self.state();
                st.reduce_left[w as usize] -= 1;
                self.maybe_update(w as usize, sched);
            }
        }
    }

    /// Starts the optimizer update of worker `w` once its compute is done
    /// and every reducing collective it takes part in has ended.
    fn maybe_update(&mut self, w: usize, sched: &mut Sched) {
        let st = self.state();
        if !st.compute_done[w] || st.reduce_left[w] > 0 || st.update_started[w] {
            return;
        }
        st.update_started[w] = true;
        let dur = st.cfg.update;
        if dur == SimDuration::ZERO {
            self.updated(w, sched);
            return;
        }
        let op = Op { kind: OpKind::Update, micro_batch: 0, stage: (w % self.p) as u32 };
        self.work[w].push_back(Work { op, duration: dur, then: Then::Updated });
        self.try_start(w, sched);
    }

    fn updated(&mut self, w: usize, sched: &mut Sched) {
        let now = sched.now();
        self.device_end[w] = self.device_end[w].max(now);
        let p = self.p;
        let st = self.state();
        if !(st.cfg.shard && st.d > 1) {
            return;
        }
        // The worker's shards are updated: one condition of each of its
        // buckets' all-gathers.
        let dev = (w % p) as u32;
        let nb = st.nb;
        let pp = st.p;
        for s in (0..=st.last_piece).filter(|s| s % pp == dev) {
            for gb in st.bucket_base[s as usize]..st.bucket_base[s as usize + 1] {
                st.satisfy(nb + gb, now, Waited::Update { worker: w as u32, at: now });
            }
        }
    }

    /// Device work on worker `w` has ended.
    pub(crate) fn work_done(&mut self, w: usize, then: Then, sched: &mut Sched) {
        let now = sched.now();
        match then {
            Then::Encoded { coll, member } => {
                let st = self.state();
                let run = st.running[coll as usize].as_mut().expect("running");
                let mut ready = Vec::new();
                for c in 0..run.copies.len() {
                    let (base, prepared) = (run.offset[c], run.copies[c].clone());
                    for &t in &prepared.by_sender[member as usize] {
                        let t = base + t;
                        run.remaining[t as usize] -= 1;
                        if run.remaining[t as usize] == 0 {
                            ready.push(t);
                        }
                    }
                }
                for t in ready {
                    self.start_sync_transfer(coll, t, now);
                }
            }
            Then::Decoded { coll } => {
                let run = self.state().running[coll as usize].as_mut().expect("running");
                run.decodes_left -= 1;
                if run.decodes_left == 0 {
                    self.collective_end(coll, sched);
                }
            }
            Then::Updated => self.updated(w, sched),
            Then::StepUpdated => {}
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::{simulate_step, RunOptions, StageCost};
    use baton_link::{LinkSpec, Topology};
    use baton_schedule::{build as build_plan, ScheduleKind, Shape};

    fn config(replicas: u32, algorithm: Algorithm, buckets: Vec<Vec<BucketSpec>>, devices: u32) -> SyncConfig {
        SyncConfig {
            replicas,
            algorithm,
            servers: Servers::default(),
            overlap: true,
            buckets,
            bytes_per_param: 2,
            compression: None,
            encode_bytes_per_s: 0,
            shard: false,
            update: SimDuration::ZERO,
            tied: None,
            nodes: vec![0; devices as usize],
        }
    }

    fn one_bucket(bytes: u64) -> BucketSpec {
        BucketSpec { bytes, gather_bytes: 0, ready_num: 1, ready_den: 1, ready_segment: None }
    }

    /// One stage, one micro-batch (forward 0, backward 1 ns), four replicas on
    /// a full mesh (every ordered pair its own link: alpha = 5 us, 10 GB/s so
    /// beta = 1e-10 s/B), one bucket of n = 1e8 bytes.
    fn alpha_beta(algorithm: Algorithm) -> u64 {
        let plan = build_plan(ScheduleKind::OneFOneB, Shape::new(1, 1, 1)).unwrap();
        let cost = StageCost::new(SimDuration(0), SimDuration(1), 0);
        let topo = Topology::full_mesh(4, LinkSpec { latency_ns: 5_000, bytes_per_s: 10_000_000_000 });
        let cfg = config(4, algorithm, vec![vec![one_bucket(100_000_000)]], 4);
        let tr = simulate_step(plan, &[cost], topo, RunOptions::default(), Some(&cfg)).unwrap();
        assert_eq!(tr.collectives.len(), 1);
        tr.step_time().as_ns() - 1
    }

    #[test]
    fn collectives_take_their_alpha_beta_times_exactly() {
        // Thakur, Rabenseifner & Gropp, "Optimization of Collective
        // Communication Operations in MPICH", IJHPCA 2005, alpha-beta terms,
        // p = 4, n = 1e8 B, alpha = 5 us, beta = 1e-10 s/B:
        // ring (Patarasuk & Yuan 2009): 2(p-1)a + 2n(p-1)/p b
        //   = 6 x 5 us + 1.5e8 x 1e-10 s = 30 us + 15 ms = 15.030 ms;
        assert_eq!(alpha_beta(Algorithm::Ring), 15_030_000);
        // Rabenseifner: 2 lg p a + 2n(p-1)/p b = 20 us + 15 ms = 15.020 ms;
        assert_eq!(alpha_beta(Algorithm::HalvingDoubling), 15_020_000);
        // binomial reduce then broadcast: 2 lg p (a + n b) = 4 x 10.005 ms.
        assert_eq!(alpha_beta(Algorithm::Tree), 40_020_000);
        // Common practice: direct, each sends n to three others over its
        // own links at once: a + n b.
        assert_eq!(alpha_beta(Algorithm::Direct), 10_005_000);
    }

    #[test]
    fn dedicated_parameter_servers_are_limited_by_their_incoming_links() {
        // Four workers and two dedicated servers on one switch, device links
        // of B = 10 GB/s, no latency, K = 1e8 B. Push: each server receives
        // N K / S = 2e8 B through its link, 20 ms (each worker sends only
        // K = 1e8 B through its own, 10 ms); pull: the same back, 20 ms.
        // In all 2 N K / (S B) = 40 ms (common practice, no source).
        let plan = build_plan(ScheduleKind::OneFOneB, Shape::new(1, 1, 1)).unwrap();
        let cost = StageCost::new(SimDuration(0), SimDuration(1), 0);
        let link = LinkSpec { latency_ns: 0, bytes_per_s: 10_000_000_000 };
        let topo = Topology::two_level(1, 6, link, link, 1, &[0, 1, 2, 3, 4, 5]);
        let mut cfg = config(4, Algorithm::ParameterServer, vec![vec![one_bucket(100_000_000)]], 6);
        cfg.servers = Servers { count: 2, dedicated: true };
        let tr = simulate_step(plan, &[cost], topo, RunOptions::default(), Some(&cfg)).unwrap();
        assert_eq!(tr.step_time().as_ns() - 1, 40_000_000);
        let c = &tr.collectives[0];
        assert_eq!(c.wire_bytes_sent, vec![100_000_000; 4]);
        assert_eq!(c.server_bytes_sent, vec![200_000_000; 2]);
        assert_eq!(c.servers, vec![4, 5]);
    }

    #[test]
    fn one_replica_without_tied_weights_changes_nothing() {
        let plan = build_plan(ScheduleKind::OneFOneB, Shape::new(3, 5, 1)).unwrap();
        let costs = vec![StageCost::new(SimDuration(100), SimDuration(200), 1000); 3];
        let topo = || Topology::full_mesh(3, LinkSpec { latency_ns: 10, bytes_per_s: 1_000_000_000 });
        let plain = crate::simulate(plan.clone(), &costs, topo()).unwrap();
        let cfg = config(1, Algorithm::Ring, vec![vec![one_bucket(5000)]; 3], 3);
        let synced = simulate_step(plan, &costs, topo(), RunOptions::default(), Some(&cfg)).unwrap();
        assert_eq!(plain.ops, synced.ops);
        assert_eq!(plain.transfers, synced.transfers);
        assert!(synced.collectives.is_empty());
        assert_eq!(plain.step_time(), synced.step_time());
    }

    #[test]
    fn overlapped_buckets_hide_behind_the_last_backward() {
        // Two replicas of one stage, one micro-batch: forward 100, backward
        // 1000 ns; two buckets of 1000 B, the first final halfway through the
        // backward. Free-standing links: 1 GB/s, no latency; ring of two:
        // reduce-scatter then all-gather of 500 B each = 500 + 500 ns.
        // Bucket 0: ready at 100 + 500 = 600, sync 600..1600. Bucket 1: ready
        // at 1100, waits for the group until 1600, sync 1600..2600.
        let plan = build_plan(ScheduleKind::OneFOneB, Shape::new(1, 1, 1)).unwrap();
        let cost = StageCost::new(SimDuration(100), SimDuration(1000), 0);
        let topo = || Topology::full_mesh(2, LinkSpec { latency_ns: 0, bytes_per_s: 1_000_000_000 });
        let buckets = vec![vec![
            BucketSpec { bytes: 1000, gather_bytes: 0, ready_num: 1, ready_den: 2, ready_segment: None },
            BucketSpec { bytes: 1000, gather_bytes: 0, ready_num: 2, ready_den: 2, ready_segment: None },
        ]];
        let mut cfg = config(2, Algorithm::Ring, buckets, 2);
        let tr = simulate_step(plan.clone(), &[cost], topo(), RunOptions::default(), Some(&cfg)).unwrap();
        let spans: Vec<(u64, u64)> = tr.collectives.iter().map(|c| (c.start.0, c.end.0)).collect();
        assert_eq!(spans, vec![(600, 1600), (1600, 2600)]);
        assert_eq!(tr.step_time().as_ns(), 2600);
        assert_eq!(tr.device_end, vec![SimTime(2600); 2]);
        // Without overlap both wait for the backward's end at 1100.
        cfg.overlap = false;
        let tr = simulate_step(plan, &[cost], topo(), RunOptions::default(), Some(&cfg)).unwrap();
        let spans: Vec<(u64, u64)> = tr.collectives.iter().map(|c| (c.start.0, c.end.0)).collect();
        assert_eq!(spans, vec![(1100, 2100), (2100, 3100)]);
    }

    #[test]
    fn compression_encodes_and_decodes_on_the_device_and_shrinks_the_wire() {
        // Two replicas, one bucket of 8000 dense bytes at 4 bytes per value,
        // 8-bit quantisation: 2000 bytes on the wire, 1000 per ring step at
        // 1 GB/s: 1000 + 1000 ns. Encode and decode: 8000 B at 8 GB/s = 1000
        // ns each. Backward ends at 1100: encode 1100..2100, ring 2100..4100,
        // decode 4100..5100.
        let plan = build_plan(ScheduleKind::OneFOneB, Shape::new(1, 1, 1)).unwrap();
        let cost = StageCost::new(SimDuration(100), SimDuration(1000), 0);
        let topo = Topology::full_mesh(2, LinkSpec { latency_ns: 0, bytes_per_s: 1_000_000_000 });
        let mut cfg = config(2, Algorithm::Ring, vec![vec![one_bucket(8000)]], 2);
        cfg.bytes_per_param = 4;
        cfg.compression = Some(Compression::Quantize { bits: 8 });
        cfg.encode_bytes_per_s = 8_000_000_000;
        cfg.update = SimDuration(300);
        let tr = simulate_step(plan, &[cost], topo, RunOptions::default(), Some(&cfg)).unwrap();
        let c = &tr.collectives[0];
        assert_eq!((c.start.0, c.end.0), (1100, 5100));
        assert_eq!(c.wire_bytes_sent, vec![2000, 2000]);
        let work: Vec<(OpKind, u64, u64)> =
            tr.ops[0].iter().filter(|r| r.op.kind.is_device_work()).map(|r| (r.op.kind, r.start.0, r.end.0)).collect();
        assert_eq!(
            work,
            vec![(OpKind::Encode, 1100, 2100), (OpKind::Encode, 4100, 5100), (OpKind::Update, 5100, 5400)]
        );
        assert_eq!(tr.step_time().as_ns(), 5400);
    }
}
