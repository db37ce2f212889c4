//! Transfers in flight over a topology, sharing links max-min fairly.

use baton_engine::SimTime;

use crate::tree::MinTree;
use crate::{LinkId, LinkSpec, Topology, TransferId};

/// Per-link counters over a run.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct LinkStats {
    /// Bytes that finished crossing the link.
    pub bytes: u64,
    /// Time during which at least one transfer was pushing bytes over it.
    pub busy_ns: u64,
    /// Largest number of transfers pushing bytes over it together for a
    /// stretch of time: counted once per instant, after every start and
    /// finish of that instant, so a transfer that starts exactly when
    /// another one's last byte leaves does not count as sharing with it, and
    /// empty transfers never count.
    pub peak_concurrent: u32,
    active: u32,
    /// Transfers with bytes on the link now.
    pushing: u32,
    busy_since: u64,
}

#[derive(Clone, Debug)]
struct Flow {
    remaining: f64,
    /// Bytes per nanosecond.
    rate: f64,
    last_ns: u64,
    /// When the last byte leaves, at the current rate (rounded up).
    completion_ns: u64,
    bytes: u64,
    src: u32,
    dst: u32,
    /// The route's links are `topo.route_links[route.0 .. route.1]`.
    route: (u32, u32),
    live: bool,
    /// On finite links, sharing bandwidth (not instant).
    on_links: bool,
    /// The link that set the current rate, and since when.
    limit: u32,
    limit_since: u64,
    /// The link that limited the rate for the longest stretch, and how long.
    top: u32,
    top_ns: u64,
    /// How much longer (or shorter) than usual this transfer's bytes and
    /// latency take (1: as the links say).
    factor: f64,
}

const NO_LINK: u32 = u32::MAX;

/// What the component walk and water-filling read of a flow.
#[derive(Clone, Copy, Debug, Default)]
struct FlowSharing {
    /// Component-walk marks (epoch: in the component; epoch + 1: fixed).
    mark: u32,
    /// The settle in which its rate was last recomputed.
    settled: u32,
    /// Its narrowest finite link (always part of its water-filling).
    narrowest: u32,
    route: (u32, u32),
}

impl Flow {
    /// Records that the rate is set by link `limit` from `now` on.
    fn note_limit(&mut self, limit: u32, now: u64) {
        if self.limit == limit {
            return;
        }
        if self.limit != NO_LINK {
            let stretch = now - self.limit_since;
            if stretch > self.top_ns || self.top == NO_LINK {
                self.top = self.limit;
                self.top_ns = stretch;
            }
        }
        self.limit = limit;
        self.limit_since = now;
    }

    /// Sets a new rate, bringing progress up to now at the old one; returns
    /// whether the completion time changed.
    fn set_rate(&mut self, now: u64, rate: f64, limit: u32) -> bool {
        self.note_limit(limit, now);
        if self.rate == rate {
            // Same rate: progress stays linear from the last checkpoint.
            return false;
        }
        if self.rate.is_finite() && self.rate > 0.0 {
            self.remaining = (self.remaining - self.rate * (now - self.last_ns) as f64).max(0.0);
        }
        self.last_ns = now;
        self.rate = rate;
        self.completion_ns = now.saturating_add(ceil_ns(self.remaining / rate));
        true
    }
}

/// What [`Network::finish`] returns about a transfer whose last byte left.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Finished {
    /// Sending device.
    pub src: u32,
    /// Receiving device.
    pub dst: u32,
    /// Bytes carried.
    pub bytes: u64,
    /// When the bytes arrive at `dst`: last byte out plus the route's latency.
    pub delivered_at: SimTime,
    /// The link that held the transfer's rate down for the longest stretch
    /// (`None` when it never shared a finite link).
    pub bottleneck: Option<LinkId>,
}

/// Transfers in flight over a topology, with max-min fair rates.
///
/// Starting and finishing transfers only records the change; [`Network::settle`]
/// then recomputes the rates of every transfer connected to a changed link
/// and returns the earliest completion, where the caller keeps its deadline. Calling it once per simulated instant, after all of that
/// instant's starts and finishes, gives the same rates as calling it after
/// each change (rates are a function of who is in flight).
///
/// Cost of a settle: water-filling over the connected component of the
/// changed links, `O(rounds x links in the component + route lengths)`, then a
/// scan of the transfers in flight for the earliest completion. It grows with
/// the number of concurrent transfers and the links they cross, never with
/// the size of the topology. Links that cannot limit any of their transfers
/// (their capacity is at least the sum of what each transfer could get through
/// the rest of its route) are left out of the water-filling; dropping a
/// constraint that the others imply does not change the max-min allocation.
#[derive(Clone, Debug)]
pub struct Network {
    topo: Topology,
    /// Capacity in bytes per nanosecond (infinite for unlimited links).
    cap: Vec<f64>,
    on_link: Vec<Vec<u32>>,
    /// Flows on each link whose route has more than one finite link.
    multi_hop: Vec<u32>,
    /// Per link: the sum over its flows of the most each could get elsewhere
    /// on its route (finite part), and how many could get without limit.
    bound_sum: Vec<f64>,
    bound_inf: Vec<u32>,
    /// Finite links that can limit a transfer on them.
    binding: Vec<bool>,
    link_mark: Vec<u32>,
    flows: Vec<Flow>,
    /// The fields of each flow slot the component walk reads, kept apart
    /// from the rest so the walk touches little memory.
    walk: Vec<FlowSharing>,
    free: Vec<u32>,
    stats: Vec<LinkStats>,
    /// Links whose transfer count rose this instant (peak taken at settle).
    peak_pending: Vec<u32>,
    peak_mark: Vec<bool>,
    epoch: u32,
    in_flight: usize,
    /// Links whose membership changed since the last settle.
    dirty: Vec<u32>,
    dirty_mark: Vec<bool>,
    /// A completion time may have changed since the last settle.
    next_stale: bool,
    /// Completion time of each flow slot in flight (`u64::MAX` otherwise).
    due: MinTree,
    // Scratch space reused between calls.
    comp_flows: Vec<u32>,
    comp_links: Vec<u32>,
    residual: Vec<f64>,
    unfixed: Vec<u32>,
    scratch_bounds: Vec<(usize, f64, usize)>,
    /// Settle generation, and the generation in which each link's rates were
    /// last recomputed (a link is recomputed at most once per settle).
    settle_gen: u32,
    link_done: Vec<u32>,
}

/// Rounds a non-negative duration in ns up to a whole ns, ignoring float noise.
fn ceil_ns(x: f64) -> u64 {
    if !x.is_finite() || x <= 0.0 {
        return if x.is_finite() || x < 0.0 { 0 } else { u64::MAX / 4 };
    }
    let t = x - 1e-6;
    if t <= 0.0 {
        return 0;
    }
    let whole = t as u64;
    if (whole as f64) < t {
        whole + 1
    } else {
        whole
    }
}

impl Network {
    /// An idle network over `topo`.
    pub fn new(topo: Topology) -> Self {
        let n = topo.link_count();
        let cap = topo
            .links
            .iter()
            .map(|l| if l.bytes_per_s == LinkSpec::UNLIMITED { f64::INFINITY } else { l.bytes_per_s as f64 / 1e9 })
            .collect();
        Network {
            topo,
            cap,
            on_link: vec![Vec::new(); n],
            multi_hop: vec![0; n],
            bound_sum: vec![0.0; n],
            bound_inf: vec![0; n],
            binding: vec![false; n],
            link_mark: vec![0; n],
            flows: Vec::new(),
            walk: Vec::new(),
            free: Vec::new(),
            stats: vec![LinkStats::default(); n],
            peak_pending: Vec::new(),
            peak_mark: vec![false; n],
            epoch: 0,
            in_flight: 0,
            dirty: Vec::new(),
            dirty_mark: vec![false; n],
            next_stale: false,
            due: MinTree::default(),
            comp_flows: Vec::new(),
            comp_links: Vec::new(),
            residual: vec![0.0; n],
            unfixed: vec![0; n],
            scratch_bounds: Vec::new(),
            settle_gen: 0,
            link_done: vec![0; n],
        }
    }

    /// The topology the transfers cross.
    pub fn topology(&self) -> &Topology {
        &self.topo
    }

    /// Transfers whose bytes are still being pushed.
    pub fn in_flight(&self) -> usize {
        self.in_flight
    }

    /// Counters per link, indexed like the topology's links.
    pub fn stats(&self) -> &[LinkStats] {
        &self.stats
    }

    /// Whether starts or finishes await [`Network::settle`].
    pub fn needs_settle(&self) -> bool {
        !self.dirty.is_empty() || self.next_stale
    }

    /// The rate (bytes per second) a transfer in flight is granted now
    /// (as of the last settle).
    pub fn rate_bytes_per_s(&self, id: TransferId) -> Option<f64> {
        self.flows.get(id.0 as usize).filter(|f| f.live).map(|f| f.rate * 1e9)
    }

    /// When a transfer in flight will have pushed its last byte (as of the
    /// last settle).
    pub fn completion_of(&self, id: TransferId) -> Option<SimTime> {
        self.flows.get(id.0 as usize).filter(|f| f.live).map(|f| SimTime(f.completion_ns))
    }

    /// The sum of the rates of the transfers on link `l`, in bytes per second
    /// (as of the last settle): never more than its bandwidth.
    pub fn load_bytes_per_s(&self, l: LinkId) -> f64 {
        self.on_link[l.0 as usize].iter().map(|&f| self.flows[f as usize].rate).sum::<f64>() * 1e9
    }

    /// Recomputes whether finite link `l` can limit any of its transfers
    /// (see the type's doc); a kept link never changes the result.
    fn update_binding(&mut self, l: usize) {
        self.binding[l] = self.bound_inf[l] > 0 || self.bound_sum[l] >= self.cap[l] * (1.0 - 1e-9);
    }

    fn mark_dirty(&mut self, l: usize) {
        if !self.dirty_mark[l] {
            self.dirty_mark[l] = true;
            self.dirty.push(l as u32);
        }
    }

    /// Calls `visit(link, bound, finite links on the route)` for each finite
    /// link of `route`, where `bound` is the smallest capacity among the
    /// route's other finite links (infinite when there is none).
    fn each_bound(&self, route: (u32, u32), mut visit: impl FnMut(usize, f64, usize)) {
        let links = &self.topo.route_links[route.0 as usize..route.1 as usize];
        // The two smallest capacities give every "smallest of the others".
        let (mut min1, mut min1_at, mut min2, mut finite) = (f64::INFINITY, usize::MAX, f64::INFINITY, 0usize);
        for (i, l) in links.iter().enumerate() {
            let c = self.cap[l.0 as usize];
            if !c.is_finite() {
                continue;
            }
            finite += 1;
            if c < min1 {
                min2 = min1;
                min1 = c;
                min1_at = i;
            } else if c < min2 {
                min2 = c;
            }
        }
        for (i, l) in links.iter().enumerate() {
            let k = l.0 as usize;
            if self.cap[k].is_finite() {
                visit(k, if i == min1_at { min2 } else { min1 }, finite);
            }
        }
    }

    /// Starts sending `bytes` from `src` to `dst` at `now`. Its rate is set
    /// by the next [`Network::settle`], which also says when the next last
    /// byte leaves; at that time [`Network::take_due`] lists the transfers
    /// to finish.
    pub fn start(&mut self, now: SimTime, src: u32, dst: u32, bytes: u64) -> TransferId {
        self.start_varied(now, src, dst, bytes, 1.0)
    }

    /// [`Network::start`] for a transfer whose bytes take `factor` times as
    /// long as usual to push (as if it were `factor` times as large, so it
    /// shares links as usual) and whose latency is `factor` times the
    /// route's (rounded to the nearest nanosecond); the links still count
    /// `bytes`. `factor` must be positive and finite.
    pub fn start_varied(&mut self, now: SimTime, src: u32, dst: u32, bytes: u64, factor: f64) -> TransferId {
        let now = now.as_ns();
        let route = self.topo.route_bounds(src, dst);
        let flow = Flow {
            factor,
            remaining: bytes as f64 * factor,
            rate: 0.0,
            last_ns: now,
            // Not due until it has a rate (instant transfers are set below).
            completion_ns: u64::MAX,
            bytes,
            src,
            dst,
            route,
            live: true,
            on_links: false,
            limit: NO_LINK,
            limit_since: now,
            top: NO_LINK,
            top_ns: 0,
        };
        let id = match self.free.pop() {
            Some(i) => {
                self.flows[i as usize] = flow;
                self.walk[i as usize] = FlowSharing { mark: 0, settled: 0, narrowest: NO_LINK, route };
                i
            }
            None => {
                self.flows.push(flow);
                self.walk.push(FlowSharing { mark: 0, settled: 0, narrowest: NO_LINK, route });
                (self.flows.len() - 1) as u32
            }
        };
        self.in_flight += 1;
        self.next_stale = true;
        // Every link crossed counts as busy; only finite ones share bandwidth.
        for r in route.0..route.1 {
            let l = self.topo.route_links[r as usize].0 as usize;
            let st = &mut self.stats[l];
            if st.active == 0 {
                st.busy_since = now;
            }
            st.active += 1;
            if bytes > 0 {
                st.pushing += 1;
                if !self.peak_mark[l] {
                    self.peak_mark[l] = true;
                    self.peak_pending.push(l as u32);
                }
            }
        }
        let mut any = false;
        let single = route.1 - route.0 == 1;
        if bytes > 0 && single {
            // One link: nothing else on the route bounds the transfer.
            let l = self.topo.route_links[route.0 as usize].0 as usize;
            if self.cap[l].is_finite() {
                any = true;
                self.on_link[l].push(id);
                self.bound_inf[l] += 1;
                self.binding[l] = true;
                self.mark_dirty(l);
                self.walk[id as usize].narrowest = l as u32;
            }
        } else if bytes > 0 {
            let mut added = std::mem::take(&mut self.scratch_bounds);
            added.clear();
            self.each_bound(route, |l, b, n| added.push((l, b, n)));
            let mut narrowest = usize::MAX;
            for &(l, b, n) in &added {
                any = true;
                self.on_link[l].push(id);
                self.multi_hop[l] += (n > 1) as u32;
                if b.is_finite() {
                    self.bound_sum[l] += b;
                } else {
                    self.bound_inf[l] += 1;
                }
                self.update_binding(l);
                // A link that cannot limit anyone changes no rate; the new
                // transfer's narrowest link always can, so it gets a rate.
                if self.binding[l] {
                    self.mark_dirty(l);
                }
                if narrowest == usize::MAX || self.cap[l] < self.cap[narrowest] {
                    narrowest = l;
                }
            }
            self.walk[id as usize].narrowest = narrowest as u32;
            self.scratch_bounds = added;
        }
        if !any {
            // Nothing to share: the last byte leaves at once.
            let f = &mut self.flows[id as usize];
            f.rate = f64::INFINITY;
            f.completion_ns = now;
            self.due.set(id as usize, now);
            return TransferId(id);
        }
        self.flows[id as usize].on_links = true;
        TransferId(id)
    }

    /// The transfers whose last byte has left by `now`, in order of
    /// completion (ties by id), appended to `out`; finish each with
    /// [`Network::finish`].
    pub fn take_due(&mut self, now: SimTime, out: &mut Vec<TransferId>) {
        // The caller's deadline has fired: the next settle says when the next is.
        self.next_stale = true;
        let first = out.len();
        self.due.due(now.as_ns(), out);
        let flows = &self.flows;
        out[first..].sort_unstable_by_key(|t| (flows[t.0 as usize].completion_ns, t.0));
    }

    /// Ends a transfer whose last byte has left and says when its bytes
    /// arrive. The bandwidth it frees is handed out at the next settle.
    pub fn finish(&mut self, now: SimTime, id: TransferId) -> Finished {
        let now = now.as_ns();
        let i = id.0 as usize;
        let (src, dst, bytes, route, on_links, factor) = {
            let f = &self.flows[i];
            (f.src, f.dst, f.bytes, f.route, f.on_links, f.factor)
        };
        for r in route.0..route.1 {
            let l = self.topo.route_links[r as usize].0 as usize;
            let st = &mut self.stats[l];
            st.bytes += bytes;
            st.active -= 1;
            st.pushing -= (bytes > 0) as u32;
            if st.active == 0 {
                st.busy_ns += now - st.busy_since;
            }
        }
        if on_links && route.1 - route.0 == 1 {
            let l = self.topo.route_links[route.0 as usize].0 as usize;
            if let Some(pos) = self.on_link[l].iter().position(|&x| x == id.0) {
                self.on_link[l].swap_remove(pos);
            }
            self.bound_inf[l] -= 1;
            self.update_binding(l);
            self.mark_dirty(l);
        } else if on_links {
            let mut removed = std::mem::take(&mut self.scratch_bounds);
            removed.clear();
            self.each_bound(route, |l, b, n| removed.push((l, b, n)));
            for &(l, b, n) in &removed {
                let multi = n > 1;
                if let Some(pos) = self.on_link[l].iter().position(|&x| x == id.0) {
                    self.on_link[l].swap_remove(pos);
                }
                self.multi_hop[l] -= multi as u32;
                if b.is_finite() {
                    self.bound_sum[l] -= b;
                    if self.on_link[l].is_empty() {
                        self.bound_sum[l] = 0.0; // no drift once a link empties
                    }
                } else {
                    self.bound_inf[l] -= 1;
                }
                // Only a link that could limit its transfers before frees
                // bandwidth that changes rates.
                if self.binding[l] {
                    self.mark_dirty(l);
                }
                self.update_binding(l);
            }
            self.scratch_bounds = removed;
        }
        self.note_limit(i, NO_LINK, now);
        self.due.set(i, u64::MAX);
        let f = &mut self.flows[i];
        f.live = false;
        let bottleneck = (f.top != NO_LINK).then_some(LinkId(f.top));
        self.free.push(id.0);
        self.in_flight -= 1;
        self.next_stale = true;
        let mut latency = self.topo.route_latency(src, dst);
        if factor != 1.0 {
            latency = baton_engine::SimDuration((latency.as_ns() as f64 * factor).round() as u64);
        }
        Finished { src, dst, bytes, delivered_at: SimTime(now) + latency, bottleneck }
    }

    /// Records that flow `i`'s rate is set by link `limit` from `now` on.
    fn note_limit(&mut self, i: usize, limit: u32, now: u64) {
        self.flows[i].note_limit(limit, now);
    }

    /// Recomputes the rates of every transfer connected (through shared
    /// links) to a link whose transfers changed since the last call, and
    /// returns when the next transfer's last byte leaves (`None` when none is
    /// in flight): the caller keeps its deadline there. Call it before
    /// simulated time moves on.
    pub fn settle(&mut self, now: SimTime) -> Option<SimTime> {
        // Every start and finish of this instant is in: the count now is the
        // one that holds until the next change.
        for l in self.peak_pending.drain(..) {
            let st = &mut self.stats[l as usize];
            st.peak_concurrent = st.peak_concurrent.max(st.pushing);
            self.peak_mark[l as usize] = false;
        }
        self.settle_gen = self.settle_gen.wrapping_add(1);
        if self.settle_gen == 0 {
            self.link_done.iter_mut().for_each(|g| *g = 0);
            self.walk.iter_mut().for_each(|w| w.settled = 0);
            self.settle_gen = 1;
        }
        while let Some(l) = self.dirty.pop() {
            let l = l as usize;
            self.dirty_mark[l] = false;
            let gen = self.settle_gen;
            if self.on_link[l].is_empty()
                || self.link_done[l] == gen
                || self.on_link[l].iter().all(|&f| self.walk[f as usize].settled == gen)
            {
                continue;
            }
            if self.multi_hop[l] == 0 {
                self.rerate_one_link(now.as_ns(), l);
            } else {
                self.rerate_component(now.as_ns(), l);
            }
        }
        self.next_stale = false;
        self.due.min().map(SimTime)
    }

    /// Sets a flow's new rate, bringing its progress up to now at the old one.
    fn apply_rate(&mut self, now: u64, g: u32, rate: f64, limit: u32) {
        if self.flows[g as usize].set_rate(now, rate, limit) {
            self.due.set(g as usize, self.flows[g as usize].completion_ns);
            self.next_stale = true;
        }
    }

    /// The common case: every flow on link `l` crosses no other finite link,
    /// so max-min fairness is an equal share of its capacity.
    fn rerate_one_link(&mut self, now: u64, l: usize) {
        let share = self.cap[l] / self.on_link[l].len() as f64;
        for idx in 0..self.on_link[l].len() {
            let g = self.on_link[l][idx];
            self.apply_rate(now, g, share, l as u32);
        }
    }

    /// Water-filling over the component of flows connected to link `start`
    /// through links that can limit them.
    fn rerate_component(&mut self, now: u64, start: usize) {
        self.epoch = self.epoch.wrapping_add(2);
        if self.epoch < 2 {
            // Marks wrapped around: clear them so stale marks cannot match.
            self.walk.iter_mut().for_each(|w| w.mark = 0);
            self.link_mark.iter_mut().for_each(|m| *m = 0);
            self.epoch = 2;
        }
        let epoch = self.epoch;
        let fixed = epoch + 1;
        let gen = self.settle_gen;
        let Network {
            topo,
            cap,
            on_link,
            binding,
            link_mark,
            flows,
            walk,
            comp_flows,
            comp_links,
            residual,
            unfixed,
            link_done,
            next_stale,
            due,
            ..
        } = self;
        let route_links = &topo.route_links[..];
        comp_flows.clear();
        comp_links.clear();

        // Seed with the changed link's flows, then walk flows and the links
        // that can limit them (a flow's narrowest link always counts).
        for &g in &on_link[start] {
            let w = &mut walk[g as usize];
            if w.mark != epoch {
                w.mark = epoch;
                comp_flows.push(g);
            }
        }
        let mut head = 0;
        while head < comp_flows.len() {
            let g = comp_flows[head] as usize;
            head += 1;
            let FlowSharing { route: (r0, r1), narrowest, .. } = walk[g];
            for &LinkId(k) in &route_links[r0 as usize..r1 as usize] {
                let ku = k as usize;
                if !(binding[ku] || k == narrowest) || link_mark[ku] == epoch {
                    continue;
                }
                link_mark[ku] = epoch;
                comp_links.push(k);
                for &h in &on_link[ku] {
                    let w = &mut walk[h as usize];
                    if w.mark != epoch {
                        w.mark = epoch;
                        comp_flows.push(h);
                    }
                }
            }
        }

        // Water-filling: repeatedly saturate the link with the smallest fair share.
        for &l in comp_links.iter() {
            residual[l as usize] = cap[l as usize];
            unfixed[l as usize] = on_link[l as usize].len() as u32;
        }
        let mut left = comp_flows.len();
        while left > 0 {
            let mut best: Option<(f64, u32)> = None;
            for &l in comp_links.iter() {
                let n = unfixed[l as usize];
                if n == 0 {
                    continue;
                }
                let share = residual[l as usize].max(0.0) / n as f64;
                if best.is_none_or(|(s, _)| share < s) {
                    best = Some((share, l));
                }
            }
            let Some((share, l)) = best else { break };
            for &g in &on_link[l as usize] {
                let w = &mut walk[g as usize];
                if w.mark != epoch {
                    continue;
                }
                w.mark = fixed;
                left -= 1;
                for &LinkId(k) in &route_links[w.route.0 as usize..w.route.1 as usize] {
                    if link_mark[k as usize] == epoch {
                        residual[k as usize] -= share;
                        unfixed[k as usize] -= 1;
                    }
                }
                let f = &mut flows[g as usize];
                if f.set_rate(now, share, l) {
                    due.set(g as usize, f.completion_ns);
                    *next_stale = true;
                }
                walk[g as usize].settled = gen;
            }
        }
        // The component's links are final for this settle.
        for &l in comp_links.iter() {
            link_done[l as usize] = gen;
        }
    }
}

#[cfg(test)]
pub(crate) mod tests {
    use super::*;
    use baton_engine::{Fired, Scheduler};
    use proptest::prelude::*;

    /// The key of the one deadline these tests keep for the network.
    #[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
    pub(crate) struct Due;

    /// An engine scheduler that keeps the network's deadline where
    /// [`Network::settle`] says, as a simulation does.
    pub(crate) struct Sched<E> {
        inner: Scheduler<E, Due>,
        set: Option<SimTime>,
    }

    impl<E> Sched<E> {
        pub(crate) fn new() -> Self {
            Sched { inner: Scheduler::new(), set: None }
        }
        pub(crate) fn now(&self) -> SimTime {
            self.inner.now()
        }
        pub(crate) fn schedule(&mut self, at: SimTime, e: E) {
            self.inner.schedule(at, e);
        }
        pub(crate) fn peek_time(&self) -> Option<SimTime> {
            self.inner.peek_time()
        }
        pub(crate) fn deadline_of(&self) -> Option<SimTime> {
            self.inner.deadline_of(&Due)
        }
        pub(crate) fn pop(&mut self) -> Option<(SimTime, Fired<E, Due>)> {
            let fired = self.inner.pop();
            if let Some((_, Fired::Deadline(Due))) = fired {
                self.set = None;
            }
            fired
        }
        pub(crate) fn settle(&mut self, net: &mut Network) {
            let next = net.settle(self.inner.now());
            if next != self.set {
                match next {
                    Some(t) => self.inner.set_deadline(Due, t),
                    None => {
                        self.inner.cancel_deadline(&Due);
                    }
                }
                self.set = next;
            }
        }
    }

    /// Runs transfers `(start_ns, src, dst, bytes)` to completion; returns each
    /// one's delivery time in ns, in input order.
    pub(crate) fn deliveries(topo: Topology, transfers: &[(u64, u32, u32, u64)]) -> Vec<u64> {
        let mut net = Network::new(topo);
        let mut sched: Sched<usize> = Sched::new();
        for (i, t) in transfers.iter().enumerate() {
            sched.schedule(SimTime(t.0), i);
        }
        let mut ids = std::collections::HashMap::new();
        let mut out = vec![0; transfers.len()];
        let mut due = Vec::new();
        while let Some((now, fired)) = sched.pop() {
            match fired {
                Fired::Event(i) => {
                    let (_, s, d, b) = transfers[i];
                    let id = net.start(sched.now(), s, d, b);
                    ids.insert(id, i);
                }
                Fired::Deadline(Due) => {
                    due.clear();
                    net.take_due(now, &mut due);
                    for &id in &due {
                        let fin = net.finish(sched.now(), id);
                        assert!(fin.delivered_at >= now);
                        out[ids.remove(&id).unwrap()] = fin.delivered_at.0;
                    }
                }
            }
            // Settle once the instant's changes are all in, before time moves on.
            if sched.peek_time() != Some(now) {
                sched.settle(&mut net);
            }
        }
        assert_eq!(net.in_flight(), 0);
        out
    }

    const GBPS64: LinkSpec = LinkSpec { latency_ns: 5_000, bytes_per_s: 64_000_000_000 };

    #[test]
    fn single_transfer_is_latency_plus_bytes_over_bandwidth() {
        // 8 MiB at 64 GB/s = 8388608 / 64 B/ns = 131072 ns, plus 5 us latency.
        let t = deliveries(Topology::full_mesh(2, GBPS64), &[(0, 0, 1, 8 << 20)]);
        assert_eq!(t, vec![5_000 + 131_072]);
        // Rounding up: 1000 B at 3 B/s... here 1001 B at 1 GB/s -> 1001 ns exactly;
        // 1 B at 3 GB/s -> 1/3 ns rounds up to 1 ns.
        let slow = LinkSpec { latency_ns: 0, bytes_per_s: 3_000_000_000 };
        assert_eq!(deliveries(Topology::full_mesh(2, slow), &[(0, 0, 1, 1)]), vec![1]);
    }

    #[test]
    fn two_equal_transfers_share_and_finish_together_at_twice_the_time() {
        // Processor sharing: each gets half of 64 B/ns, so 2 * 131072 ns.
        let t = deliveries(Topology::full_mesh(2, GBPS64), &[(0, 0, 1, 8 << 20), (0, 0, 1, 8 << 20)]);
        assert_eq!(t, vec![5_000 + 262_144, 5_000 + 262_144]);
    }

    #[test]
    fn opposite_directions_do_not_share() {
        let t = deliveries(Topology::full_mesh(2, GBPS64), &[(0, 0, 1, 8 << 20), (0, 1, 0, 8 << 20)]);
        assert_eq!(t, vec![136_072, 136_072]);
    }

    #[test]
    fn late_joiner_slows_then_first_finishes_and_second_speeds_up() {
        // Link 1000 B/us = 1 B/ns, no latency. A: 1000 B at t=0. B: 1000 B at t=500.
        // 0..500: A alone, 500 B done. 500..1500: both at 0.5 B/ns, A's last 500 B
        // done at 1500; B has 500 B done. 1500..2000: B alone, its last 500 B.
        let spec = LinkSpec { latency_ns: 0, bytes_per_s: 1_000_000_000 };
        let t = deliveries(Topology::full_mesh(2, spec), &[(0, 0, 1, 1000), (500, 0, 1, 1000)]);
        assert_eq!(t, vec![1500, 2000]);
    }

    #[test]
    fn zero_bytes_and_self_sends_cost_only_latency() {
        let t = deliveries(Topology::full_mesh(3, GBPS64), &[(10, 0, 2, 0), (10, 1, 1, 1 << 20)]);
        assert_eq!(t, vec![5_010, 10]);
    }

    #[test]
    fn stats_count_bytes_busy_time_and_concurrency() {
        let spec = LinkSpec { latency_ns: 0, bytes_per_s: 1_000_000_000 };
        let topo = Topology::full_mesh(2, spec);
        let mut net = Network::new(topo);
        let mut sched: Sched<()> = Sched::new();
        let a = net.start(sched.now(), 0, 1, 1000);
        let b = net.start(sched.now(), 0, 1, 1000);
        sched.settle(&mut net);
        assert_eq!(net.rate_bytes_per_s(a), Some(5e8));
        let mut done = 0;
        while let Some((now, f)) = sched.pop() {
            if let Fired::Deadline(Due) = f {
                let mut due = Vec::new();
                net.take_due(now, &mut due);
                for id in due {
                    assert!(id == a || id == b);
                    net.finish(sched.now(), id);
                    done += 1;
                }
            }
            sched.settle(&mut net);
        }
        assert_eq!(done, 2);
        let l = net.topology().route(0, 1)[0];
        let st = &net.stats()[l.0 as usize];
        assert_eq!((st.bytes, st.busy_ns, st.peak_concurrent), (2000, 2000, 2));
        assert_eq!(net.topology().link_name(l), "dev0->dev1");
    }

    /// "At once" means pushing bytes over the link together for a stretch of
    /// time. On one 1 B/ns link (worked by hand): A (1,000 B) runs 0-1000
    /// alone; B starts at 1000, the instant A's last byte leaves, so the link
    /// never carries both (peak 1); C (500 B) starts at 1250 while B runs
    /// (peak 2); an empty transfer started beside them adds nothing.
    #[test]
    fn transfers_count_as_concurrent_only_when_they_share_time() {
        let spec = LinkSpec { latency_ns: 0, bytes_per_s: 1_000_000_000 };
        let mut net = Network::new(Topology::full_mesh(2, spec));
        let mut sched: Sched<u8> = Sched::new();
        let l = net.topology().route(0, 1)[0].0 as usize;
        net.start(sched.now(), 0, 1, 1000);
        net.start(sched.now(), 0, 1, 0);
        sched.settle(&mut net);
        sched.schedule(SimTime(1000), 1); // B's start, as A's last byte leaves
        sched.schedule(SimTime(1250), 2); // C's start
        let mut peaks = Vec::new();
        while let Some((now, f)) = sched.pop() {
            match f {
                Fired::Deadline(Due) => {
                    let mut due = Vec::new();
                    net.take_due(now, &mut due);
                    for id in due {
                        net.finish(sched.now(), id);
                    }
                }
                Fired::Event(1) => {
                    // Whichever of B's start and A's finish comes first
                    // within the instant, they never share a stretch of time.
                    net.start(sched.now(), 0, 1, 1000);
                }
                Fired::Event(_) => {
                    net.start(sched.now(), 0, 1, 500);
                }
            }
            if sched.peek_time() != Some(now) {
                sched.settle(&mut net);
                peaks.push((now.as_ns(), net.stats()[l].peak_concurrent));
            }
        }
        assert_eq!(peaks.iter().find(|p| p.0 == 1000).map(|p| p.1), Some(1), "{peaks:?}");
        assert_eq!(net.stats()[l].peak_concurrent, 2);
        assert_eq!(net.stats()[l].bytes, 2500);
    }

    #[test]
    fn water_filling_worked_example_on_two_links() {
        // Max-min fairness as defined in Bertsekas & Gallager, Data Networks,
        // 2nd ed., 1992, sec. 6.5.2, computed by the water-filling that section
        // describes; the example and its numbers are our own, not printed in
        // the book. L1 capacity 10, L2 capacity 4 (here GB/s); A on L1, B on
        // L1+L2, C on L2. Fair shares: L1 10/2 = 5, L2 4/2 = 2; L2 saturates
        // first, fixing B = C = 2; L1 then has 10 - 2 = 8 left for A alone.
        // Rates (8, 2, 2) GB/s.
        // Devices: 0 -L1-> 1 -L2-> 2. A: 0->1, B: 0->2, C: 1->2.
        let gb = 1_000_000_000;
        let l1 = LinkSpec { latency_ns: 0, bytes_per_s: 10 * gb };
        let l2 = LinkSpec { latency_ns: 0, bytes_per_s: 4 * gb };
        let (a, b) = (LinkId(0), LinkId(1));
        let routes =
            vec![vec![vec![], vec![a], vec![a, b]], vec![vec![], vec![], vec![b]], vec![vec![], vec![], vec![]]];
        let topo = Topology::from_routes(vec![("L1".into(), l1), ("L2".into(), l2)], &routes);
        let mut net = Network::new(topo);
        let mut sched: Sched<()> = Sched::new();
        let fa = net.start(sched.now(), 0, 1, 1 << 30);
        let fb = net.start(sched.now(), 0, 2, 1 << 30);
        let fc = net.start(sched.now(), 1, 2, 1 << 30);
        sched.settle(&mut net);
        let rates: Vec<f64> = [fa, fb, fc].iter().map(|&f| net.rate_bytes_per_s(f).unwrap() / gb as f64).collect();
        assert_eq!(rates, vec![8.0, 2.0, 2.0]);
    }

    /// Devices 0 -L1-> 1 -L2-> 2, latency 0, capacities in bytes per ns.
    fn two_links(c1: u64, c2: u64) -> Topology {
        let spec = |c: u64| LinkSpec { latency_ns: 0, bytes_per_s: c * 1_000_000_000 };
        let (a, b) = (LinkId(0), LinkId(1));
        let routes =
            vec![vec![vec![], vec![a], vec![a, b]], vec![vec![], vec![], vec![b]], vec![vec![], vec![], vec![]]];
        Topology::from_routes(vec![("L1".into(), spec(c1)), ("L2".into(), spec(c2))], &routes)
    }

    #[test]
    fn water_filling_completion_times() {
        // Max-min fairness (Bertsekas & Gallager, Data Networks, 2nd ed., 1992,
        // sec. 6.5.2), computed by water-filling as that section describes; our
        // own worked example, not numbers from the book. L1 capacity 10, L2
        // capacity 4; A on L1, B on L1+L2, C on L2 get (8, 2, 2) (see above). With 8000 bytes each:
        // A finishes at 8000/8 = 1000 ns; B and C have 2000 sent then, and keep
        // sharing L2 at 2 each: 6000/2 more -> 4000 ns.
        let t = deliveries(two_links(10, 4), &[(0, 0, 1, 8000), (0, 0, 2, 8000), (0, 1, 2, 8000)]);
        assert_eq!(t, vec![1000, 4000, 4000]);
        // Adding D on L1: shares L1 10/3, L2 2; L2 fixes B = C = 2, then A and
        // D split L1's remaining 8: (4, 2, 2, 4). A and D finish at 8000/4 = 2000;
        // B and C have 4000 sent then and finish 4000/2 later, at 4000.
        let t = deliveries(two_links(10, 4), &[(0, 0, 1, 8000), (0, 0, 2, 8000), (0, 1, 2, 8000), (0, 0, 1, 8000)]);
        assert_eq!(t, vec![2000, 4000, 4000, 2000]);
        // Both capacities 1 with A, B, C: both links' shares are 1/2, so
        // (0.5, 0.5, 0.5); 1000 bytes take 2000 ns.
        let mut net = Network::new(two_links(1, 1));
        let mut sched: Sched<()> = Sched::new();
        let ids: Vec<TransferId> =
            [(0, 1), (0, 2), (1, 2)].iter().map(|&(a, b)| net.start(sched.now(), a, b, 1000)).collect();
        sched.settle(&mut net);
        for id in &ids {
            assert_eq!(net.rate_bytes_per_s(*id), Some(0.5e9));
            assert_eq!(net.completion_of(*id), Some(SimTime(2000)));
        }
        assert_eq!(sched.deadline_of(), Some(SimTime(2000)));
    }

    /// Max-min fair rates (bytes per second) by textbook water-filling over
    /// every link, nothing left out (Bertsekas & Gallager, sec. 6.5.2).
    fn reference_rates(topo: &Topology, flows: &[(TransferId, &[LinkId])]) -> Vec<f64> {
        let mut rate = vec![None; flows.len()];
        let mut residual: Vec<f64> =
            (0..topo.link_count()).map(|l| topo.link(LinkId(l as u32)).bytes_per_s as f64).collect();
        loop {
            let mut best: Option<(f64, usize)> = None;
            for (l, r) in residual.iter().enumerate() {
                let n = flows
                    .iter()
                    .enumerate()
                    .filter(|(i, f)| rate[*i].is_none() && f.1.contains(&LinkId(l as u32)))
                    .count();
                if n > 0 && best.is_none_or(|(s, _)| r / (n as f64) < s) {
                    best = Some((r / n as f64, l));
                }
            }
            let Some((share, l)) = best else { break };
            for (i, f) in flows.iter().enumerate() {
                if rate[i].is_none() && f.1.contains(&LinkId(l as u32)) {
                    rate[i] = Some(share);
                    for k in f.1 {
                        residual[k.0 as usize] -= share;
                    }
                }
            }
        }
        rate.into_iter().map(|r| r.unwrap_or(0.0)).collect()
    }

    /// A route's latency on a two-level cluster with devices numbered
    /// node-major, from the README's rule (not from the topology): nothing
    /// on one device; inside a node the sender's link up and the receiver's
    /// down; across nodes those two plus a card out and a card in.
    fn two_level_latency(a: u32, b: u32, dpn: u32, device_ns: u64, card_ns: u64) -> u64 {
        if a == b {
            0
        } else if a / dpn == b / dpn {
            2 * device_ns
        } else {
            2 * device_ns + 2 * card_ns
        }
    }

    proptest! {
        #![proptest_config(ProptestConfig { cases: 200, ..ProptestConfig::default() })]

        /// On random two-level clusters and random transfers: every byte sent
        /// is delivered on every link of its route, no link ever carries more
        /// than its bandwidth, and no transfer beats its time alone.
        #[test]
        fn sharing_is_conservative_and_capacity_bound(
            nodes in 1u32..4, dpn in 1u32..4, cards in 1u32..3,
            transfers in prop::collection::vec((0u64..5_000, 0u32..12, 0u32..12, 0u64..200_000), 1..25),
        ) {
            let devices = nodes * dpn;
            let dl = LinkSpec { latency_ns: 300, bytes_per_s: 40_000_000_000 };
            let nl = LinkSpec { latency_ns: 900, bytes_per_s: 10_000_000_000 };
            let used: Vec<u32> = (0..devices).collect();
            let topo = Topology::two_level(nodes, dpn, dl, nl, cards, &used);
            let ts: Vec<(u64, u32, u32, u64)> = transfers.iter().map(|&(t, a, b, n)| (t, a % devices, b % devices, n)).collect();
            let mut net = Network::new(topo.clone());
            let mut sched: Sched<usize> = Sched::new();
            for (i, t) in ts.iter().enumerate() {
                sched.schedule(SimTime(t.0), i);
            }
            let mut ids = std::collections::HashMap::new();
            let mut done = vec![0u64; ts.len()];
            while let Some((now, fired)) = sched.pop() {
                match fired {
                    Fired::Event(i) => { ids.insert(net.start(sched.now(), ts[i].1, ts[i].2, ts[i].3), i); }
                    Fired::Deadline(Due) => {
                        let mut due = Vec::new();
                        net.take_due(now, &mut due);
                        for id in due {
                            done[ids[&id]] = net.finish(sched.now(), id).delivered_at.0;
                        }
                    }
                }
                if sched.peek_time() != Some(now) {
                    sched.settle(&mut net);
                    for l in 0..topo.link_count() {
                        let cap = topo.link(LinkId(l as u32)).bytes_per_s as f64;
                        prop_assert!(net.load_bytes_per_s(LinkId(l as u32)) <= cap * (1.0 + 1e-9));
                    }
                    // The rates equal plain water-filling over every link.
                    let live: Vec<(TransferId, &[LinkId])> = ids
                        .iter()
                        .filter(|(id, _)| net.completion_of(**id).is_some())
                        .filter(|(_, &i)| ts[i].3 > 0 && !topo.route(ts[i].1, ts[i].2).is_empty())
                        .map(|(&id, &i)| (id, topo.route(ts[i].1, ts[i].2)))
                        .collect();
                    let want = reference_rates(&topo, &live);
                    for ((id, _), r) in live.iter().zip(want) {
                        let got = net.rate_bytes_per_s(*id).unwrap();
                        prop_assert!((got - r).abs() <= 1e-6 * r.max(1.0), "rate {got} vs {r}");
                    }
                }
            }
            for l in 0..topo.link_count() {
                let id = LinkId(l as u32);
                let want: u64 = ts.iter().filter(|t| topo.route(t.1, t.2).contains(&id)).map(|t| t.3).sum();
                prop_assert_eq!(net.stats()[l].bytes, want);
            }
            // Alone, a transfer takes its route's latency plus its bytes at
            // the narrowest link: 40 B/ns inside a node, 10 B/ns across.
            for (i, t) in ts.iter().enumerate() {
                let per_ns = if t.1 / dpn == t.2 / dpn { 40 } else { 10 };
                let alone = if t.1 == t.2 { 0 } else { t.3.div_ceil(per_ns) };
                prop_assert!(done[i] >= t.0 + two_level_latency(t.1, t.2, dpn, 300, 900) + alone, "transfer {i} too fast");
            }
        }

        /// Without contention (unlimited bandwidth) a transfer costs exactly
        /// its route's latency.
        #[test]
        fn unlimited_bandwidth_costs_only_latency(
            transfers in prop::collection::vec((0u64..5_000, 0u32..8, 0u32..8, 0u64..1_000_000), 1..20),
        ) {
            let dl = LinkSpec { latency_ns: 300, bytes_per_s: LinkSpec::UNLIMITED };
            let nl = LinkSpec { latency_ns: 900, bytes_per_s: LinkSpec::UNLIMITED };
            let used: Vec<u32> = (0..8).collect();
            let topo = Topology::two_level(2, 4, dl, nl, 1, &used);
            let got = deliveries(topo.clone(), &transfers);
            for (i, t) in transfers.iter().enumerate() {
                prop_assert_eq!(got[i], t.0 + two_level_latency(t.1, t.2, 4, 300, 900));
            }
        }
    }
}
