use super::*;
use proptest::prelude::*;

fn flat(g: u32) -> Vec<u32> {
    (0..g).collect()
}

fn all_reduce(a: Algorithm, nodes: &[u32], n: u64) -> Graph {
    build(a, Goal::AllReduce, nodes, n, Servers::default()).unwrap()
}

/// Bytes that leave each node (sender's node differs from receiver's).
fn cross_node_bytes(g: &Graph, nodes: &[u32]) -> Vec<u64> {
    let max = *nodes.iter().max().unwrap() as usize;
    let mut out = vec![0; max + 1];
    for t in g.transfers() {
        let (a, b) = (nodes[t.from as usize], nodes[t.to as usize]);
        if a != b {
            out[a as usize] += t.bytes;
        }
    }
    out
}

fn cross_node_rounds(g: &Graph, nodes: &[u32]) -> usize {
    let mut rounds: Vec<u32> =
        g.transfers().iter().filter(|t| nodes[t.from as usize] != nodes[t.to as usize]).map(|t| t.round).collect();
    rounds.dedup();
    rounds.len()
}

#[test]
fn chunks_differ_by_at_most_one_byte() {
    assert_eq!(chunk_sizes(10, 4), vec![3, 3, 2, 2]);
    assert_eq!(chunk_sizes(8, 4), vec![2, 2, 2, 2]);
    assert_eq!(chunk_sizes(2, 4), vec![1, 1, 0, 0]);
}

#[test]
fn ring_sends_two_g_minus_one_rounds_of_n_over_g() {
    // Patarasuk & Yuan, "Bandwidth optimal all-reduce algorithms for clusters
    // of workstations", JPDC 2009: reduce-scatter then all-gather, 2(g-1)
    // rounds, each member sending n/g per round: 2n(g-1)/g per member.
    let g = all_reduce(Algorithm::Ring, &flat(4), 100_000_000);
    assert_eq!(g.rounds, 6);
    assert_eq!(g.transfers().len(), 4 * 6);
    assert!(g.transfers().iter().all(|t| t.bytes == 25_000_000 && t.to == (t.from + 1) % 4));
    assert_eq!(g.sent_bytes(), vec![150_000_000; 4]);
    g.verify().unwrap();
    // Each reduce-scatter send after the first round waits for exactly the
    // chunk it forwards; every later send waits for the previous round's
    // arrival at its sender (and, in the all-gather, for the reduce-scatter
    // arrivals of the same chunk, which happened before it anyway).
    let tr = g.transfers();
    for t in 4..tr.len() {
        if tr[t].round < 3 {
            assert_eq!(g.deps(t).len(), 1, "transfer {t}");
        }
        assert!(g.deps(t).iter().any(|&d| tr[d as usize].round + 1 == tr[t].round && tr[d as usize].to == tr[t].from));
    }
}

#[test]
fn halving_doubling_sends_the_same_bytes_in_two_lg_g_rounds() {
    // Thakur, Rabenseifner & Gropp, IJHPCA 2005: recursive-halving
    // reduce-scatter + recursive-doubling all-gather, lg g rounds each,
    // n(g-1)/g bytes per member each.
    let g = all_reduce(Algorithm::HalvingDoubling, &flat(8), 80);
    assert_eq!(g.rounds, 6);
    // Halving: 40, 20, 10 bytes; doubling: 10, 20, 40.
    let per_round: Vec<u64> = (0..6).map(|r| g.transfers().iter().find(|t| t.round == r).unwrap().bytes).collect();
    assert_eq!(per_round, vec![40, 20, 10, 10, 20, 40]);
    assert_eq!(g.sent_bytes(), vec![140; 8]);
    g.verify().unwrap();
}

#[test]
fn binomial_tree_reduces_then_broadcasts_the_whole_vector() {
    // Thakur et al. 2005: binomial reduce + broadcast, lg g rounds each of n.
    let g = all_reduce(Algorithm::Tree, &flat(4), 1000);
    assert_eq!(g.rounds, 4);
    assert_eq!(g.transfers().len(), 6);
    assert!(g.transfers().iter().all(|t| t.bytes == 1000));
    // Reduce: 1->0, 3->2, then 2->0; broadcast: 0->2, then 0->1, 2->3.
    let pairs: Vec<(u32, u32)> = g.transfers().iter().map(|t| (t.from, t.to)).collect();
    assert_eq!(pairs, vec![(1, 0), (3, 2), (2, 0), (0, 2), (0, 1), (2, 3)]);
    g.verify().unwrap();
}

#[test]
fn direct_sends_n_to_every_other_member() {
    // Common practice, no source: everyone-to-everyone sends K(N-1) per member.
    let g = all_reduce(Algorithm::Direct, &flat(5), 1000);
    assert_eq!(g.sent_bytes(), vec![4000; 5]);
    assert_eq!(g.rounds, 1);
    assert!((0..g.transfers().len()).all(|t| g.deps(t).is_empty()));
    g.verify().unwrap();
}

#[test]
fn parameter_server_workers_send_k_and_servers_receive_k_n_over_s() {
    // Common practice, no source: each worker sends K, each of S dedicated
    // servers receives K·N/S and returns as much.
    let servers = Servers { count: 2, dedicated: true };
    let g = build(Algorithm::ParameterServer, Goal::AllReduce, &flat(4), 1000, servers).unwrap();
    assert_eq!(g.participants, 6);
    assert_eq!(g.sent_bytes(), vec![1000, 1000, 1000, 1000, 2000, 2000]);
    assert_eq!(g.received_bytes(), vec![1000, 1000, 1000, 1000, 2000, 2000]);
    g.verify().unwrap();
    // A pull waits for every push to its server.
    let pull = g.transfers().iter().position(|t| t.from == 4).unwrap();
    assert_eq!(g.deps(pull).len(), 4);
    // Colocated: server k is member k, and its own shard does not travel.
    let servers = Servers { count: 2, dedicated: false };
    let g = build(Algorithm::ParameterServer, Goal::AllReduce, &flat(4), 1000, servers).unwrap();
    assert_eq!(g.participants, 4);
    // Members 0 and 1 push 500 to the other server and return 500 to three.
    assert_eq!(g.sent_bytes(), vec![500 + 1500, 500 + 1500, 1000, 1000]);
    g.verify().unwrap();
}

#[test]
fn hierarchical_crosses_the_cards_with_n_in_two_rounds_where_ring_needs_fourteen() {
    // Two nodes of four members, one card each. A flat ring over the eight
    // members (node-major order) crosses between the nodes at two points, so
    // each card carries one chunk of n/8 in every one of the 2(8-1) = 14
    // rounds: 1.75n. The two-level ring crosses only in its middle phase:
    // four rings of two members all-reduce n/4 each, one reduce-scatter round
    // and one all-gather round of n/8 per member, four members per node:
    // n per card in 2 rounds.
    let nodes = [0, 0, 0, 0, 1, 1, 1, 1];
    let n = 8_000_000;
    let ring = all_reduce(Algorithm::Ring, &nodes, n);
    assert_eq!(cross_node_bytes(&ring, &nodes), vec![14_000_000, 14_000_000]);
    assert_eq!(cross_node_rounds(&ring, &nodes), 14);
    let hier = all_reduce(Algorithm::Hierarchical, &nodes, n);
    assert_eq!(cross_node_bytes(&hier, &nodes), vec![8_000_000, 8_000_000]);
    assert_eq!(cross_node_rounds(&hier, &nodes), 2);
    hier.verify().unwrap();
    // Still bandwidth-optimal per member: 2n(g-1)/g.
    assert_eq!(hier.sent_bytes(), vec![14_000_000; 8]);
}

#[test]
fn hierarchical_on_one_node_or_one_member_per_node_is_the_ring() {
    let n = 1_000_003;
    let ring = all_reduce(Algorithm::Ring, &flat(6), n);
    let strip = |g: &Graph| g.transfers().to_vec();
    assert_eq!(strip(&all_reduce(Algorithm::Hierarchical, &[7; 6], n)), strip(&ring));
    assert_eq!(strip(&all_reduce(Algorithm::Hierarchical, &flat(6), n)), strip(&ring));
}

#[test]
fn errors_name_what_is_wrong() {
    let s = Servers::default();
    assert_eq!(
        build(Algorithm::HalvingDoubling, Goal::AllReduce, &flat(6), 1, s).unwrap_err(),
        CollectiveError::NotPowerOfTwo(6)
    );
    assert_eq!(
        build(Algorithm::Hierarchical, Goal::AllReduce, &[0, 0, 1], 1, s).unwrap_err(),
        CollectiveError::UnevenNodes { first: 0, expected: 2, node: 1, found: 1 }
    );
    assert_eq!(
        build(Algorithm::ParameterServer, Goal::AllReduce, &flat(2), 1, Servers { count: 3, dedicated: false })
            .unwrap_err(),
        CollectiveError::TooManyServers { servers: 3, members: 2 }
    );
    assert_eq!(
        build(Algorithm::Tree, Goal::ReduceScatter, &flat(2), 1, s).unwrap_err(),
        CollectiveError::NoHalves("tree")
    );
    assert_eq!(build(Algorithm::Ring, Goal::AllReduce, &[], 1, s).unwrap_err(), CollectiveError::Empty);
}

#[test]
fn a_missing_dependency_is_caught_by_verify() {
    let mut g = all_reduce(Algorithm::Ring, &flat(3), 30);
    // Drop every dependency: forwarded chunks then carry only the sender's
    // own contribution.
    g.deps.clear();
    g.dep_start.iter_mut().for_each(|d| *d = 0);
    assert!(g.verify().unwrap_err().contains("without"), "{:?}", g.verify());
}

#[test]
fn halves_put_each_chunk_at_its_owner_and_back() {
    for a in [Algorithm::Ring, Algorithm::HalvingDoubling, Algorithm::Hierarchical, Algorithm::Direct] {
        let nodes = [0, 0, 1, 1];
        let rs = build(a, Goal::ReduceScatter, &nodes, 1000, Servers::default()).unwrap();
        rs.verify().unwrap();
        let ag = build(a, Goal::AllGather, &nodes, 1000, Servers::default()).unwrap();
        ag.verify().unwrap();
        // Each half moves n(g-1)/g per member.
        assert_eq!(rs.sent_bytes(), vec![750; 4], "{a:?}");
        assert_eq!(ag.sent_bytes(), vec![750; 4], "{a:?}");
        // The same owners on both sides, so the halves compose.
        assert_eq!(rs.owner(), ag.owner(), "{a:?}");
    }
}

fn algorithms() -> impl Strategy<Value = Algorithm> {
    prop::sample::select(Algorithm::ALL.to_vec())
}

proptest! {
    /// Every algorithm delivers: each chunk reaches every member with every
    /// member's contribution (all-reduce, all-gather), or its owner
    /// (reduce-scatter).
    #[test]
    fn every_collective_delivers(
        a in algorithms(),
        g in 1u32..=12,
        per_node in 1u32..=4,
        n in 0u64..10_000,
        servers in 1u32..=4,
        dedicated in any::<bool>(),
        goal in prop::sample::select(vec![Goal::AllReduce, Goal::ReduceScatter, Goal::AllGather]),
    ) {
        let g = if a == Algorithm::HalvingDoubling { 1 << (g % 5) } else { g };
        let per_node = if a == Algorithm::Hierarchical && g % per_node != 0 { 1 } else { per_node };
        let nodes: Vec<u32> = (0..g).map(|m| m / per_node).collect();
        let servers = Servers { count: if dedicated { servers } else { servers.min(g) }, dedicated };
        match build(a, goal, &nodes, n, servers) {
            Ok(graph) => {
                prop_assert_eq!(graph.verify(), Ok(()));
                let total: u64 = graph.sent_bytes().iter().sum();
                prop_assert_eq!(total, graph.received_bytes().iter().sum::<u64>());
            }
            Err(e) => prop_assert!(goal == Goal::ReduceScatter && !a.has_halves(), "{e}"),
        }
    }

    /// Patarasuk & Yuan (2009): an all-reduce among g members moves at least
    /// 2n(g-1) bytes in all when it uses only the members' own devices, so
    /// the busiest member sends at least 2n(g-1)/g; ring and
    /// halving-doubling meet the bound at every member.
    #[test]
    fn all_reduce_meets_the_bandwidth_bound(
        a in algorithms(),
        g in 1u32..=10,
        k in 0u64..5_000,
        servers in 1u32..=4,
    ) {
        let g = if a == Algorithm::HalvingDoubling { 1 << (g % 4) } else { g };
        let n = k * u64::from(g);
        let nodes: Vec<u32> = (0..g).map(|m| m / 2).collect();
        let nodes = if a == Algorithm::Hierarchical && g % 2 == 1 { flat(g) } else { nodes };
        let graph = build(a, Goal::AllReduce, &nodes, n, Servers { count: servers.min(g), dedicated: false }).unwrap();
        let sent = graph.sent_bytes();
        let total: u64 = sent.iter().sum();
        let bound = 2 * n * u64::from(g - 1);
        prop_assert!(total >= bound, "{a:?} moves {total} < {bound}");
        prop_assert!(*sent.iter().max().unwrap() * u64::from(g) >= bound);
        if matches!(a, Algorithm::Ring | Algorithm::HalvingDoubling | Algorithm::Hierarchical) {
            prop_assert!(sent.iter().all(|&s| s * u64::from(g) == bound), "{a:?}: {sent:?}");
        }
    }
}
