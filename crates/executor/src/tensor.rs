//! Tensor-parallel stages: a stage runs on a group of `t` devices in
//! lock-step. Each of its ops is a sequence of segments: compute (every rank
//! at once, for its share of the layer) and all-reduces among the group's
//! devices, each played as a ring (`baton-collective`) on the shared network.
//! The next segment starts when the all-reduce has arrived everywhere; the op
//! ends with its last segment.

use std::collections::HashMap;
use std::rc::Rc;

use baton_collective::{build, Algorithm, Goal, Servers};
use baton_engine::{SimDuration, SimTime};
use baton_schedule::{Op, OpKind};

use crate::sync::Prepared;
use crate::{Event, Executor, Sched, TENSOR_BIT};

/// One step of a tensor-parallel op.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Segment {
    /// Every rank computes for this long.
    Compute(SimDuration),
    /// The ranks all-reduce this many bytes (a ring among the group).
    AllReduce(u64),
}

/// How the stages are split over tensor-parallel groups.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct TensorConfig {
    /// `t`: devices per group (at least 2 for any effect).
    pub ranks: u32,
    /// Per virtual stage, per op kind (forward, backward, weight): its
    /// segments. Their compute adds up to the stage cost's time for the kind;
    /// an empty list means the op is one compute of that time.
    pub segments: Vec<[Vec<Segment>; 3]>,
}

/// One point-to-point transfer of a tensor-parallel all-reduce.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct TensorTransferRecord {
    /// The op whose all-reduce it belongs to.
    pub op: Op,
    /// The group (worker) running the op.
    pub worker: u32,
    /// The segment of the op.
    pub segment: u32,
    /// Its round in the ring.
    pub round: u32,
    /// Sending device.
    pub src: u32,
    /// Receiving device.
    pub dst: u32,
    /// Bytes carried.
    pub bytes: u64,
    /// When the send began.
    pub start: SimTime,
    /// Last byte left the sender.
    pub sent: SimTime,
    /// Data arrived.
    pub end: SimTime,
    /// The link that held it back the longest, if it shared a finite link.
    pub bottleneck: Option<u32>,
}

struct Running {
    prepared: Rc<Prepared>,
    remaining: Vec<u32>,
    left: u32,
    started: SimTime,
}

/// Per worker: where its op is among its segments.
#[derive(Clone, Copy)]
struct Progress {
    op: Op,
    segment: usize,
    factor: f64,
}

pub(crate) struct State {
    pub(crate) config: TensorConfig,
    progress: Vec<Option<Progress>>,
    running: Vec<Option<Running>>,
    pub(crate) records: Vec<TensorTransferRecord>,
    /// Per record: its transfer index in the graph.
    graph_transfer: Vec<u32>,
    /// Per worker: time spent in all-reduces.
    pub(crate) comm_ns: Vec<u64>,
    cache: HashMap<u64, Rc<Prepared>>,
}

impl State {
    pub(crate) fn new(config: TensorConfig, workers: usize) -> State {
        State {
            config,
            progress: vec![None; workers],
            running: (0..workers).map(|_| None).collect(),
            records: Vec::new(),
            graph_transfer: Vec::new(),
            comm_ns: vec![0; workers],
            cache: HashMap::new(),
        }
    }

    /// The segments of `op`, if it has any.
    pub(crate) fn segments(&self, op: Op) -> Option<&[Segment]> {
        let k = match op.kind {
            OpKind::Forward => 0,
            OpKind::Backward => 1,
            OpKind::Weight => 2,
            OpKind::Encode | OpKind::Update => return None,
        };
        self.config.segments.get(op.stage as usize).map(|s| &s[k][..]).filter(|s| !s.is_empty())
    }
}

impl Executor<'_> {
    fn tensor_state(&mut self) -> &mut State {
        self.tensor.as_mut().expect("called only with tensor parallelism")
    }

    /// Starts `op` on worker `w` as a sequence of segments.
    pub(crate) fn start_segments(&mut self, w: usize, op: Op, factor: f64, sched: &mut Sched) {
        self.tensor_state().progress[w] = Some(Progress { op, segment: 0, factor });
        self.run_segment(w, sched);
    }

    fn run_segment(&mut self, w: usize, sched: &mut Sched) {
        let now = sched.now();
        let t = self.t as u32;
        let st = self.tensor_state();
        let Some(pr) = st.progress[w] else { return };
        let segment = st.segments(pr.op).expect("an op with segments")[pr.segment];
        match segment {
            Segment::Compute(d) => {
                let d = if pr.factor == 1.0 { d } else { SimDuration((d.as_ns() as f64 * pr.factor).round() as u64) };
                sched.schedule(now + d, Event::SegmentDone(w as u32));
            }
            Segment::AllReduce(bytes) => {
                let prepared = match st.cache.get(&bytes) {
                    Some(p) => p.clone(),
                    None => {
                        let nodes = vec![0; t as usize];
                        let graph = build(Algorithm::Ring, Goal::AllReduce, &nodes, bytes, Servers::default())
                            .expect("a ring of at least one member always builds");
                        let p = Rc::new(Prepared::new(graph));
                        st.cache.insert(bytes, p.clone());
                        p
                    }
                };
                let n = prepared.graph.transfers().len();
                let remaining: Vec<u32> = (0..n).map(|i| prepared.graph.deps(i).len() as u32).collect();
                let ready: Vec<u32> = (0..n as u32).filter(|&i| remaining[i as usize] == 0).collect();
                st.running[w] = Some(Running { prepared, remaining, left: n as u32, started: now });
                for i in ready {
                    self.start_tensor_transfer(w, i, now);
                }
                if n == 0 {
                    self.all_reduce_done(w, sched);
                }
            }
        }
    }

    fn start_tensor_transfer(&mut self, w: usize, i: u32, now: SimTime) {
        let t = self.t as u32;
        let st = self.tensor.as_mut().expect("tensor");
        let pr = st.progress[w].expect("running op");
        let run = st.running[w].as_ref().expect("running all-reduce");
        let tr = run.prepared.graph.transfers()[i as usize];
        let (src, dst) = (w as u32 * t + tr.from, w as u32 * t + tr.to);
        let idx = st.records.len() as u32;
        st.records.push(TensorTransferRecord {
            op: pr.op,
            worker: w as u32,
            segment: pr.segment as u32,
            round: tr.round,
            src,
            dst,
            bytes: tr.bytes,
            start: now,
            sent: now,
            end: now,
            bottleneck: None,
        });
        st.graph_transfer.push(i);
        self.transfers.start(now, src, dst, tr.bytes, idx | TENSOR_BIT);
    }

    /// A tensor transfer (index in the records) has arrived.
    pub(crate) fn tensor_arrival(&mut self, idx: u32, sched: &mut Sched) {
        let now = sched.now();
        let st = self.tensor_state();
        let rec = &mut st.records[idx as usize];
        rec.end = now;
        let w = rec.worker as usize;
        let i = st.graph_transfer[idx as usize];
        let run = st.running[w].as_mut().expect("running all-reduce");
        run.left -= 1;
        let prepared = run.prepared.clone();
        let ready = prepared.release(0, i, &mut run.remaining);
        let done = run.left == 0;
        for n in ready {
            self.start_tensor_transfer(w, n, now);
        }
        if done {
            self.all_reduce_done(w, sched);
        }
    }

    fn all_reduce_done(&mut self, w: usize, sched: &mut Sched) {
        let now = sched.now();
        let st = self.tensor_state();
        if let Some(run) = st.running[w].take() {
            st.comm_ns[w] += now.saturating_since(run.started).as_ns();
        }
        self.segment_done(w, sched);
    }

    /// The current segment of worker `w`'s op has ended.
    pub(crate) fn segment_done(&mut self, w: usize, sched: &mut Sched) {
        let now = sched.now();
        let st = self.tensor_state();
        let Some(mut pr) = st.progress[w] else { return };
        let len = st.segments(pr.op).map_or(0, <[Segment]>::len);
        if self.sync.is_some() {
            self.sync_segment_done(w, pr.segment as u32, sched);
        }
        pr.segment += 1;
        let st = self.tensor_state();
        if pr.segment < len {
            st.progress[w] = Some(pr);
            self.run_segment(w, sched);
            return;
        }
        st.progress[w] = None;
        if let Some(rec) = self.ops[w].last_mut() {
            rec.end = now;
        }
        self.op_done(w, sched);
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::{simulate_parallel, RunOptions, StageCost};
    use baton_link::{LinkSpec, Topology};
    use baton_schedule::{build as build_plan, ScheduleKind, Shape};

    fn ns(n: u64) -> SimDuration {
        SimDuration(n)
    }

    /// Two devices on one switch (1 us, 1 GB/s per device link), one tensor
    /// group running one stage.
    fn one_group(p: u32, m: u32, segments: [Vec<Segment>; 3], cost: StageCost) -> crate::Trace {
        let plan = build_plan(ScheduleKind::OneFOneB, Shape::new(p, m, 1)).unwrap();
        let link = LinkSpec { latency_ns: 1_000, bytes_per_s: 1_000_000_000 };
        let devices: Vec<u32> = (0..2 * p).collect();
        let topo = Topology::two_level(1, 2 * p, link, link, 1, &devices);
        let config = TensorConfig { ranks: 2, segments: vec![segments; p as usize] };
        simulate_parallel(plan, &vec![cost; p as usize], topo, RunOptions::default(), None, Some(&config)).unwrap()
    }

    #[test]
    fn a_two_device_group_computes_half_and_all_reduces_twice_per_pass() {
        // Worked by hand. Forward: compute 500 ns (the layer's 1000 ns over
        // t = 2), an all-reduce, 500 ns, an all-reduce; backward the same
        // with 1000 ns parts. A ring of two on 1000 B is a reduce-scatter
        // round and an all-gather round of 500 B; each crosses the sender's
        // device link and the receiver's (latency 1 us each): 500 B at
        // 1 GB/s = 500 ns, plus 2 us: 2500 ns a round, 5000 ns an all-reduce.
        // Forward 500 + 5000 + 500 + 5000 = 11,000; backward 12,000.
        let f = vec![
            Segment::Compute(ns(500)),
            Segment::AllReduce(1000),
            Segment::Compute(ns(500)),
            Segment::AllReduce(1000),
        ];
        let b = vec![
            Segment::Compute(ns(1000)),
            Segment::AllReduce(1000),
            Segment::Compute(ns(1000)),
            Segment::AllReduce(1000),
        ];
        let tr = one_group(1, 1, [f, b, Vec::new()], StageCost::new(ns(1000), ns(2000), 0));
        assert_eq!(tr.step_time().as_ns(), 23_000);
        assert_eq!(tr.ops.len(), 2, "one row per device");
        assert_eq!(tr.ops[0], tr.ops[1], "the ranks run in lock-step");
        let spans: Vec<(u64, u64)> = tr.ops[0].iter().map(|r| (r.start.0, r.end.0)).collect();
        assert_eq!(spans, vec![(0, 11_000), (11_000, 23_000)]);
        assert_eq!(tr.tensor_comm_ns, vec![20_000, 20_000]);
        // Four all-reduces of two rounds, each round one transfer per rank.
        assert_eq!(tr.tensor_transfers.len(), 16);
        assert!(tr.tensor_transfers.iter().all(|t| t.bytes == 500));
    }

    #[test]
    fn between_stages_each_rank_sends_its_share_to_the_same_rank() {
        // Two stages of two-device groups, no all-reduce (compute only): each
        // boundary crossing is two transfers, rank k to rank k, each of the
        // stage's (per-rank) bytes.
        let f = vec![Segment::Compute(ns(100))];
        let b = vec![Segment::Compute(ns(200))];
        let tr = one_group(2, 2, [f, b, Vec::new()], StageCost::new(ns(100), ns(200), 4000));
        assert_eq!(tr.ops.len(), 4);
        assert_eq!(tr.transfers.len(), 2 * 2 * 2, "2 micro-batches x 2 directions x 2 ranks");
        for t in &tr.transfers {
            assert_eq!(t.src % 2, t.dst % 2, "rank to the same rank");
            assert_ne!(t.src / 2, t.dst / 2, "between the groups");
            assert_eq!(t.bytes, 4000);
        }
        // A consumer waits for both shares.
        let dep = tr.dependency_in(0, baton_schedule::Op::forward(0, 1)).unwrap();
        let shares: Vec<SimTime> =
            tr.transfers.iter().filter(|t| t.micro_batch == 0 && t.to_stage == 1).map(|t| t.end).collect();
        assert_eq!(dep.available_at, *shares.iter().max().unwrap());
    }
}
