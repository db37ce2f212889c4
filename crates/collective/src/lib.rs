//! # baton-collective: gradient synchronisation as point-to-point transfers
//!
//! Each synchronisation algorithm (ring, recursive halving and doubling,
//! binomial tree, two-level ring, parameter server, everyone-to-everyone) is a
//! function from a group of participants and a byte count to a [`Graph`]: the
//! point-to-point transfers that make up the collective, each with the chunks
//! of the data it carries and the earlier transfers whose data it needs. A
//! transfer may start as soon as every transfer it depends on has arrived;
//! there are no other barriers between rounds.
//!
//! Dependencies are derived, not written per algorithm: a transfer sent by a
//! participant in round `r` depends on every transfer that participant
//! received in an earlier round carrying any of the same chunks. The one
//! ordering that is not about data: a binomial tree's parent sends to its
//! children one after another, the largest subtree first (otherwise the
//! broadcast would not take its lg g rounds). The data
//! sent is the participant's own contribution plus what those transfers
//! brought, so [`Graph::verify`] can replay the contents and check that the
//! collective delivers what it promises (every member ends with every chunk
//! reduced over all members, for an all-reduce).
//!
//! Summation costs nothing here, and the crate deliberately knows nothing
//! about pipelines, devices' other work, links, bandwidth or time: the caller
//! maps participants to devices and plays the graph on its network.
#![warn(missing_docs)]

use std::ops::Range;

use thiserror::Error;

/// A synchronisation algorithm.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum Algorithm {
    /// Reduce-scatter then all-gather around a ring, 2(g-1) rounds of n/g
    /// bytes (Patarasuk & Yuan, 2009).
    Ring,
    /// Recursive-halving reduce-scatter then recursive-doubling all-gather
    /// (Rabenseifner; Thakur, Rabenseifner & Gropp, 2005). g must be a power
    /// of two.
    HalvingDoubling,
    /// Binomial-tree reduce to member 0, then binomial-tree broadcast, the
    /// whole n per message.
    Tree,
    /// Ring reduce-scatter inside each node, ring all-reduce across nodes
    /// among members with the same local index, ring all-gather inside each
    /// node.
    Hierarchical,
    /// Every worker pushes n/S to each of S servers; each server returns its
    /// reduced shard to every worker once it has every push.
    ParameterServer,
    /// Every member sends its whole n to every other member.
    Direct,
}

impl Algorithm {
    /// Every algorithm, in the order documentation lists them.
    pub const ALL: [Algorithm; 6] = [
        Algorithm::Ring,
        Algorithm::HalvingDoubling,
        Algorithm::Tree,
        Algorithm::Hierarchical,
        Algorithm::ParameterServer,
        Algorithm::Direct,
    ];

    /// The name scenario files use.
    pub fn name(self) -> &'static str {
        match self {
            Algorithm::Ring => "ring",
            Algorithm::HalvingDoubling => "halving-doubling",
            Algorithm::Tree => "tree",
            Algorithm::Hierarchical => "hierarchical",
            Algorithm::ParameterServer => "parameter-server",
            Algorithm::Direct => "direct",
        }
    }

    /// The algorithm called `name`.
    pub fn from_name(name: &str) -> Option<Algorithm> {
        Algorithm::ALL.into_iter().find(|a| a.name() == name)
    }

    /// Whether the algorithm splits into a reduce-scatter and an all-gather
    /// (what sharded optimizer state needs).
    pub fn has_halves(self) -> bool {
        !matches!(self, Algorithm::Tree | Algorithm::ParameterServer)
    }
}

/// What a collective achieves.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum Goal {
    /// Every member ends with every chunk summed over all members.
    AllReduce,
    /// Each chunk's owner ends with that chunk summed over all members.
    ReduceScatter,
    /// Each chunk starts complete at its owner; every member ends with every
    /// chunk.
    AllGather,
}

/// Where the parameter servers are (parameter-server algorithm only).
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub struct Servers {
    /// Number of servers S (at least 1).
    pub count: u32,
    /// `false`: server k is member k (S at most g); `true`: S participants of
    /// their own after the members.
    pub dedicated: bool,
}

impl Default for Servers {
    fn default() -> Self {
        Servers { count: 1, dedicated: false }
    }
}

/// Why a collective cannot be built.
#[derive(Debug, Error, PartialEq, Eq)]
pub enum CollectiveError {
    /// Recursive halving and doubling pairs members by powers of two.
    #[error("halving-doubling needs a power-of-two number of members, found {0}")]
    NotPowerOfTwo(u32),
    /// The two-level ring needs the same number of members on every node.
    #[error("hierarchical needs the same number of members on every node: node {node} holds {found}, node {first} holds {expected}")]
    UnevenNodes {
        /// The first node.
        first: u32,
        /// Members on the first node.
        expected: u32,
        /// A node holding another number.
        node: u32,
        /// Members on it.
        found: u32,
    },
    /// Colocated servers are members, so there cannot be more than members.
    #[error("{servers} colocated servers need at least as many members, found {members}")]
    TooManyServers {
        /// Servers asked for.
        servers: u32,
        /// Members.
        members: u32,
    },
    /// A parameter server needs at least one server.
    #[error("a parameter server needs at least one server")]
    NoServers,
    /// The algorithm has no separate reduce-scatter.
    #[error("{0} has no reduce-scatter of its own")]
    NoHalves(&'static str),
    /// A collective needs at least one member.
    #[error("a collective needs at least one member")]
    Empty,
}

/// One point-to-point transfer of a collective.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Transfer {
    /// Sending participant.
    pub from: u32,
    /// Receiving participant.
    pub to: u32,
    /// Bytes carried.
    pub bytes: u64,
    /// The logical round (0-based) it belongs to; rounds number the steps of
    /// the algorithm, not a barrier.
    pub round: u32,
}

/// A collective as dependent point-to-point transfers.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Graph {
    /// What it achieves.
    pub goal: Goal,
    /// The algorithm that made it.
    pub algorithm: Algorithm,
    /// Members g: participants `0..g`, each contributing data.
    pub members: u32,
    /// Members plus dedicated servers (`g..participants`).
    pub participants: u32,
    /// Logical rounds.
    pub rounds: u32,
    chunk_bytes: Vec<u64>,
    owner: Vec<u32>,
    transfers: Vec<Transfer>,
    chunk_start: Vec<u32>,
    chunks: Vec<u32>,
    dep_start: Vec<u32>,
    deps: Vec<u32>,
}

impl Graph {
    /// The transfers, in an order where every transfer comes after those it
    /// depends on.
    pub fn transfers(&self) -> &[Transfer] {
        &self.transfers
    }

    /// Indices of the transfers transfer `t` waits for.
    pub fn deps(&self, t: usize) -> &[u32] {
        &self.deps[self.dep_start[t] as usize..self.dep_start[t + 1] as usize]
    }

    /// The chunks transfer `t` carries.
    pub fn chunks_of(&self, t: usize) -> &[u32] {
        &self.chunks[self.chunk_start[t] as usize..self.chunk_start[t + 1] as usize]
    }

    /// Bytes of each chunk the data is cut into.
    pub fn chunk_bytes(&self) -> &[u64] {
        &self.chunk_bytes
    }

    /// The member that owns each chunk (the one a reduce-scatter leaves it
    /// on, or an all-gather starts it from).
    pub fn owner(&self) -> &[u32] {
        &self.owner
    }

    /// Bytes each participant sends, indexed by participant.
    pub fn sent_bytes(&self) -> Vec<u64> {
        let mut v = vec![0; self.participants as usize];
        for t in &self.transfers {
            v[t.from as usize] += t.bytes;
        }
        v
    }

    /// Bytes each participant receives, indexed by participant.
    pub fn received_bytes(&self) -> Vec<u64> {
        let mut v = vec![0; self.participants as usize];
        for t in &self.transfers {
            v[t.to as usize] += t.bytes;
        }
        v
    }

    /// Replays what every transfer carries and checks the goal: for each
    /// transfer, the contributions it carries per chunk are the sender's own
    /// plus those of the transfers it depends on; at the end every member
    /// (all-reduce, all-gather) or owner (reduce-scatter) must hold every
    /// chunk with every member's contribution. Returns a sentence naming the
    /// first failure.
    pub fn verify(&self) -> Result<(), String> {
        let g = self.members as usize;
        let words = g.div_ceil(64).max(1);
        let full = {
            let mut f = vec![0u64; words];
            for m in 0..g {
                f[m / 64] |= 1 << (m % 64);
            }
            f
        };
        let initial = |p: usize, c: usize| -> Vec<u64> {
            let mut v = vec![0u64; words];
            match self.goal {
                Goal::AllReduce | Goal::ReduceScatter if p < g => v[p / 64] |= 1 << (p % 64),
                Goal::AllGather if self.owner[c] as usize == p => v.clone_from(&full),
                _ => {}
            }
            v
        };
        // content[t][k]: contributions transfer t carries for its k-th chunk.
        let mut content: Vec<Vec<Vec<u64>>> = Vec::with_capacity(self.transfers.len());
        for (t, tr) in self.transfers.iter().enumerate() {
            let mut carried = Vec::new();
            for &c in self.chunks_of(t) {
                let mut v = initial(tr.from as usize, c as usize);
                for &d in self.deps(t) {
                    let d = d as usize;
                    if d >= t {
                        return Err(format!("transfer {t} depends on a later transfer {d}"));
                    }
                    if self.transfers[d].to != tr.from {
                        // An ordering constraint between two sends of one
                        // participant: it carries nothing to this one.
                        continue;
                    }
                    if let Some(k) = self.chunks_of(d).iter().position(|&x| x == c) {
                        for (a, b) in v.iter_mut().zip(&content[d][k]) {
                            *a |= b;
                        }
                    }
                }
                if v.iter().all(|&w| w == 0) {
                    return Err(format!("transfer {t} sends chunk {c}, which participant {} does not have", tr.from));
                }
                carried.push(v);
            }
            content.push(carried);
        }
        let n_chunks = self.chunk_bytes.len();
        let mut state: Vec<Vec<Vec<u64>>> =
            (0..self.participants as usize).map(|p| (0..n_chunks).map(|c| initial(p, c)).collect()).collect();
        for (t, tr) in self.transfers.iter().enumerate() {
            for (k, &c) in self.chunks_of(t).iter().enumerate() {
                for (a, b) in state[tr.to as usize][c as usize].iter_mut().zip(&content[t][k]) {
                    *a |= b;
                }
            }
        }
        for (p, chunks) in state.iter().enumerate().take(g) {
            for (c, have) in chunks.iter().enumerate() {
                let needed = match self.goal {
                    Goal::AllReduce | Goal::AllGather => true,
                    Goal::ReduceScatter => self.owner[c] as usize == p,
                };
                if needed && *have != full {
                    let missing = (0..g).filter(|&m| have[m / 64] & (1 << (m % 64)) == 0).count();
                    return Err(format!("member {p} ends without {missing} member(s)' contribution to chunk {c}"));
                }
            }
        }
        Ok(())
    }
}

/// `n` bytes cut into `k` chunks that differ by at most one byte (the first
/// `n mod k` one byte longer).
pub fn chunk_sizes(n: u64, k: u32) -> Vec<u64> {
    let k64 = u64::from(k.max(1));
    (0..k64).map(|c| n / k64 + u64::from(c < n % k64)).collect()
}

struct Builder {
    goal: Goal,
    algorithm: Algorithm,
    members: u32,
    participants: u32,
    round: u32,
    chunk_bytes: Vec<u64>,
    owner: Vec<u32>,
    transfers: Vec<Transfer>,
    chunk_start: Vec<u32>,
    chunks: Vec<u32>,
    dep_start: Vec<u32>,
    deps: Vec<u32>,
    /// Per participant and chunk: (round, transfer) that brought the chunk.
    arrived: Vec<Vec<Vec<(u32, u32)>>>,
    scratch: Vec<u32>,
}

impl Builder {
    fn new(goal: Goal, algorithm: Algorithm, members: u32, participants: u32, chunk_bytes: Vec<u64>) -> Self {
        let n_chunks = chunk_bytes.len();
        Builder {
            goal,
            algorithm,
            members,
            participants,
            round: 0,
            owner: vec![0; n_chunks],
            chunk_bytes,
            transfers: Vec::new(),
            chunk_start: vec![0],
            chunks: Vec::new(),
            dep_start: vec![0],
            deps: Vec::new(),
            arrived: vec![vec![Vec::new(); n_chunks]; participants as usize],
            scratch: Vec::new(),
        }
    }

    /// Starts the next logical round (when the current one has transfers).
    fn next_round(&mut self) {
        if self.transfers.last().is_some_and(|t| t.round == self.round) {
            self.round += 1;
        }
    }

    /// A transfer of `chunks` from `from` to `to` in the current round.
    fn send(&mut self, from: u32, to: u32, chunks: impl IntoIterator<Item = u32>) {
        self.send_after(from, to, chunks, None);
    }

    /// [`Builder::send`], also waiting for transfer `after` (a send of the
    /// same participant that must arrive first).
    fn send_after(&mut self, from: u32, to: u32, chunks: impl IntoIterator<Item = u32>, after: Option<u32>) {
        if from == to {
            return;
        }
        let t = self.transfers.len() as u32;
        self.scratch.clear();
        self.scratch.extend(after);
        let mut bytes = 0;
        let start = self.chunks.len();
        for c in chunks {
            bytes += self.chunk_bytes[c as usize];
            self.chunks.push(c);
            for &(r, d) in &self.arrived[from as usize][c as usize] {
                if r < self.round {
                    self.scratch.push(d);
                }
            }
        }
        if self.chunks.len() == start {
            return;
        }
        self.scratch.sort_unstable();
        self.scratch.dedup();
        self.deps.extend_from_slice(&self.scratch);
        self.dep_start.push(self.deps.len() as u32);
        self.chunk_start.push(self.chunks.len() as u32);
        for &c in &self.chunks[start..] {
            self.arrived[to as usize][c as usize].push((self.round, t));
        }
        self.transfers.push(Transfer { from, to, bytes, round: self.round });
    }

    fn finish(self) -> Graph {
        let rounds = self.transfers.last().map_or(0, |t| t.round + 1);
        Graph {
            goal: self.goal,
            algorithm: self.algorithm,
            members: self.members,
            participants: self.participants,
            rounds,
            chunk_bytes: self.chunk_bytes,
            owner: self.owner,
            transfers: self.transfers,
            chunk_start: self.chunk_start,
            chunks: self.chunks,
            dep_start: self.dep_start,
            deps: self.deps,
        }
    }

    /// Ring reduce-scatter among `ring`: block j (a chunk range) ends summed
    /// at `ring[j]`.
    fn ring_reduce_scatter(&mut self, rings: &[(Vec<u32>, Vec<Range<u32>>)]) {
        let len = rings.first().map_or(0, |r| r.0.len());
        for k in 0..len.saturating_sub(1) {
            self.next_round();
            for (ring, blocks) in rings {
                for i in 0..len {
                    let block = (i + 2 * len - k - 1) % len;
                    self.send(ring[i], ring[(i + 1) % len], blocks[block].clone());
                }
            }
        }
    }

    /// Ring all-gather among `ring`: block j starts at `ring[j]`.
    fn ring_all_gather(&mut self, rings: &[(Vec<u32>, Vec<Range<u32>>)]) {
        let len = rings.first().map_or(0, |r| r.0.len());
        for k in 0..len.saturating_sub(1) {
            self.next_round();
            for (ring, blocks) in rings {
                for i in 0..len {
                    let block = (i + len - k) % len;
                    self.send(ring[i], ring[(i + 1) % len], blocks[block].clone());
                }
            }
        }
    }
}

/// Builds the transfers of `goal` over `bytes` among members whose node ids
/// are `nodes` (participant i is member i; only `hierarchical` looks at
/// nodes), with `servers` for the parameter server.
///
/// For an all-gather, `bytes` is the whole gathered size: each member
/// contributes one share.
pub fn build(
    algorithm: Algorithm,
    goal: Goal,
    nodes: &[u32],
    bytes: u64,
    servers: Servers,
) -> Result<Graph, CollectiveError> {
    let g = nodes.len() as u32;
    if g == 0 {
        return Err(CollectiveError::Empty);
    }
    if goal == Goal::ReduceScatter && !algorithm.has_halves() {
        return Err(CollectiveError::NoHalves(algorithm.name()));
    }
    match algorithm {
        Algorithm::Ring => Ok(ring(goal, &(0..g).collect::<Vec<_>>(), bytes)),
        Algorithm::Hierarchical => {
            // Nodes in order of first appearance, members in order within.
            let mut order: Vec<u32> = Vec::new();
            let mut by_node: Vec<Vec<u32>> = Vec::new();
            for (m, &n) in nodes.iter().enumerate() {
                match order.iter().position(|&x| x == n) {
                    Some(i) => by_node[i].push(m as u32),
                    None => {
                        order.push(n);
                        by_node.push(vec![m as u32]);
                    }
                }
            }
            let l = by_node[0].len();
            if let Some(i) = by_node.iter().position(|v| v.len() != l) {
                return Err(CollectiveError::UnevenNodes {
                    first: order[0],
                    expected: l as u32,
                    node: order[i],
                    found: by_node[i].len() as u32,
                });
            }
            Ok(hierarchical(goal, &by_node, bytes))
        }
        Algorithm::HalvingDoubling => {
            if !g.is_power_of_two() {
                return Err(CollectiveError::NotPowerOfTwo(g));
            }
            Ok(halving_doubling(goal, g, bytes))
        }
        Algorithm::Tree => Ok(tree(goal, g, bytes)),
        Algorithm::ParameterServer => parameter_server(goal, g, bytes, servers),
        Algorithm::Direct => Ok(direct(goal, g, bytes)),
    }
}

/// Plain ring over `ring` (members in ring order).
fn ring(goal: Goal, ring: &[u32], bytes: u64) -> Graph {
    let g = ring.len() as u32;
    let mut b = Builder::new(goal, Algorithm::Ring, g, g, chunk_sizes(bytes, g));
    for (j, &m) in ring.iter().enumerate() {
        b.owner[j] = m;
    }
    let rings = [(ring.to_vec(), (0..g).map(|j| j..j + 1).collect::<Vec<_>>())];
    if goal != Goal::AllGather {
        b.ring_reduce_scatter(&rings);
    }
    if goal != Goal::ReduceScatter {
        b.ring_all_gather(&rings);
    }
    b.finish()
}

/// Two-level ring: `by_node[n][j]` is node n's j-th member. Fine chunk
/// `j * N + r` belongs to local index j's block and to node r within it.
fn hierarchical(goal: Goal, by_node: &[Vec<u32>], bytes: u64) -> Graph {
    let n_nodes = by_node.len() as u32;
    let l = by_node[0].len() as u32;
    let g = n_nodes * l;
    let mut b = Builder::new(goal, Algorithm::Hierarchical, g, g, chunk_sizes(bytes, g));
    for (r, members) in by_node.iter().enumerate() {
        for (j, &m) in members.iter().enumerate() {
            b.owner[j * n_nodes as usize + r] = m;
        }
    }
    let intra: Vec<(Vec<u32>, Vec<Range<u32>>)> = by_node
        .iter()
        .map(|members| (members.clone(), (0..l).map(|j| j * n_nodes..(j + 1) * n_nodes).collect()))
        .collect();
    let cross: Vec<(Vec<u32>, Vec<Range<u32>>)> = (0..l as usize)
        .map(|j| {
            let ring = by_node.iter().map(|members| members[j]).collect();
            let base = j as u32 * n_nodes;
            (ring, (0..n_nodes).map(|r| base + r..base + r + 1).collect())
        })
        .collect();
    if goal != Goal::AllGather {
        b.ring_reduce_scatter(&intra);
        b.ring_reduce_scatter(&cross);
    }
    if goal != Goal::ReduceScatter {
        b.ring_all_gather(&cross);
        b.ring_all_gather(&intra);
    }
    b.finish()
}

fn halving_doubling(goal: Goal, g: u32, bytes: u64) -> Graph {
    let mut b = Builder::new(goal, Algorithm::HalvingDoubling, g, g, chunk_sizes(bytes, g));
    for c in 0..g {
        b.owner[c as usize] = c;
    }
    if goal != Goal::AllGather {
        // Recursive halving: each step hands the partner the half it keeps.
        let mut dist = g / 2;
        while dist >= 1 {
            b.next_round();
            for i in 0..g {
                let partner = i ^ dist;
                let start = partner & !(dist - 1);
                b.send(i, partner, start..start + dist);
            }
            dist /= 2;
        }
    }
    if goal != Goal::ReduceScatter {
        // Recursive doubling: each step sends everything gathered so far.
        let mut dist = 1;
        while dist < g {
            b.next_round();
            for i in 0..g {
                let start = i & !(dist - 1);
                b.send(i, i ^ dist, start..start + dist);
            }
            dist *= 2;
        }
    }
    b.finish()
}

fn tree(goal: Goal, g: u32, bytes: u64) -> Graph {
    // An all-reduce sends the whole vector as one chunk; an all-gather sends
    // the members' shares (the broadcast leaves out what a child's subtree
    // already holds).
    let gather = goal == Goal::AllGather;
    let chunk_sizes = if gather { chunk_sizes(bytes, g) } else { vec![bytes] };
    let mut b = Builder::new(goal, Algorithm::Tree, g, g, chunk_sizes);
    if gather {
        for c in 0..g {
            b.owner[c as usize] = c;
        }
    }
    let subtree = |i: u32, span: u32| i..(i + span).min(g);
    let mut span = 1;
    while span < g {
        b.next_round();
        let mut i = span;
        while i < g {
            let chunks = if gather { subtree(i, span) } else { 0..1 };
            b.send(i, i - span, chunks);
            i += 2 * span;
        }
        span *= 2;
    }
    // A parent sends to its children one after another, the largest subtree
    // first: the binomial tree's rounds (one message at a time per sender).
    let mut previous: Vec<Option<u32>> = vec![None; g as usize];
    while span > 1 {
        span /= 2;
        b.next_round();
        let mut i = 0;
        while i + span < g {
            let child = i + span;
            let after = previous[i as usize];
            previous[i as usize] = Some(b.transfers.len() as u32);
            if gather {
                let keep = subtree(child, span);
                b.send_after(i, child, (0..g).filter(|c| !keep.contains(c)), after);
            } else {
                b.send_after(i, child, 0..1, after);
            }
            i += 2 * span;
        }
    }
    b.finish()
}

fn parameter_server(goal: Goal, g: u32, bytes: u64, servers: Servers) -> Result<Graph, CollectiveError> {
    let s = servers.count;
    if s == 0 {
        return Err(CollectiveError::NoServers);
    }
    if !servers.dedicated && s > g {
        return Err(CollectiveError::TooManyServers { servers: s, members: g });
    }
    let server = |k: u32| if servers.dedicated { g + k } else { k };
    let participants = if servers.dedicated { g + s } else { g };
    if goal == Goal::AllGather {
        // Member i's share cut into S parts: chunk i * S + k goes through
        // server k, which returns every part it holds to every member that
        // lacks it.
        let mut b = Builder::new(goal, Algorithm::ParameterServer, g, participants, chunk_sizes(bytes, g * s));
        for c in 0..g * s {
            b.owner[c as usize] = c / s;
        }
        b.next_round();
        for i in 0..g {
            for k in 0..s {
                b.send(i, server(k), [i * s + k]);
            }
        }
        b.next_round();
        for k in 0..s {
            for j in 0..g {
                b.send(server(k), j, (0..g).filter(|&i| i != j).map(|i| i * s + k));
            }
        }
        return Ok(b.finish());
    }
    let mut b = Builder::new(goal, Algorithm::ParameterServer, g, participants, chunk_sizes(bytes, s));
    b.next_round();
    for i in 0..g {
        for k in 0..s {
            b.send(i, server(k), [k]);
        }
    }
    b.next_round();
    for k in 0..s {
        for j in 0..g {
            b.send(server(k), j, [k]);
        }
    }
    Ok(b.finish())
}

fn direct(goal: Goal, g: u32, bytes: u64) -> Graph {
    match goal {
        Goal::AllReduce => {
            let mut b = Builder::new(goal, Algorithm::Direct, g, g, vec![bytes]);
            b.next_round();
            for i in 0..g {
                for j in 0..g {
                    b.send(i, j, [0]);
                }
            }
            b.finish()
        }
        Goal::ReduceScatter | Goal::AllGather => {
            let mut b = Builder::new(goal, Algorithm::Direct, g, g, chunk_sizes(bytes, g));
            for c in 0..g {
                b.owner[c as usize] = c;
            }
            b.next_round();
            for i in 0..g {
                for j in 0..g {
                    // Reduce-scatter: my part of j's chunk to j; all-gather:
                    // my chunk to j.
                    let chunk = if goal == Goal::ReduceScatter { j } else { i };
                    b.send(i, j, [chunk]);
                }
            }
            b.finish()
        }
    }
}

#[cfg(test)]
mod tests;
