//! Two-level clusters: routes, placement, shared cards and blocking sends.

mod common;

use common::{baton, text};

use baton::scenario::parse;

const BOXES: &str = "model:\n  layers:\n    - { repeat: 4, forward: 100us, backward: 200us, activation: 1MB }\n\
    cluster:\n  nodes: 2\n  devices_per_node: 2\n  device_link: { latency: 1us, bandwidth: 100GB/s }\n  node_link: { latency: 4us, bandwidth: 10GB/s }\n\
    pipeline: { stages: 4, micro_batches: 2, schedule: 1f1b }\n";

#[test]
fn middle_boundary_across_the_fabric_by_hand() {
    // Worked by hand (no published source). Two nodes of two devices, stages
    // packed: 0, 1 on node 0 and 2, 3 on node 1, so only the 1 -> 2 boundary
    // crosses the fabric. F = 100 us, B = 200 us per stage, 1 MB per transfer.
    // Inside a node: 1e6 B at 100 B/ns = 10 us + 2 x 1 us latency = 12 us.
    // Across: limited by the 10 B/ns card: 100 us + (1 + 4 + 4 + 1) us = 110 us.
    // No two transfers ever share a link here (each one's bytes are out
    // before the next one on its route starts), so in us:
    //   d0: F0 0-100, F1 100-200; arrivals at d1: 112, 212.
    //   d1: F0 112-212, F1 212-312; cross sends 212 (bytes out 312, arrives
    //       322) and 312 (arrives 422).
    //   d2: F0 322-422, F1 422-522; sends arrive at d3 434 and 534.
    //   d3: F0 434-534, B0 534-734, F1 734-834, B1 834-1034; gradients
    //       arrive at d2 746 and 1046.
    //   d2: B0 746-946, B1 1046-1246; cross gradients arrive at d1 1056, 1356.
    //   d1: B0 1056-1256, B1 1356-1556; gradients arrive at d0 1268, 1568.
    //   d0: B0 1268-1468, B1 1568-1768.
    let s = parse(BOXES, "boxes.yaml", "boxes", &[]).unwrap();
    let out = baton::simulate(&s).unwrap();
    let us =
        |d: usize| out.trace.ops[d].iter().map(|r| (r.start.as_ns() / 1000, r.end.as_ns() / 1000)).collect::<Vec<_>>();
    assert_eq!(us(1), vec![(112, 212), (212, 312), (1056, 1256), (1356, 1556)]);
    assert_eq!(us(2), vec![(322, 422), (422, 522), (746, 946), (1046, 1246)]);
    assert_eq!(us(3), vec![(434, 534), (534, 734), (734, 834), (834, 1034)]);
    assert_eq!(us(0), vec![(0, 100), (100, 200), (1268, 1468), (1568, 1768)]);
    assert_eq!(out.report.step_time_ns, 1_768_000);
    // Device 1 waits 312..946 for device 2's backward, then 946..1056 for the
    // gradient in transit, held back by the card it crosses.
    let gaps: Vec<(u64, u64, &str)> = out
        .report
        .gaps
        .iter()
        .filter(|g| g.device == 1)
        .map(|g| (g.start_ns / 1000, g.end_ns / 1000, g.cause.as_str()))
        .collect();
    assert_eq!(gaps[1..3], [(312, 946, "gradient"), (946, 1056, "link")]);
    let link_gap = out.report.gaps.iter().find(|g| g.device == 1 && g.cause.as_str() == "link").unwrap();
    assert!(link_gap.detail.to_string().contains("node1-card0 up"), "{}", link_gap.detail);
    let card = out.report.links.iter().find(|l| l.name == "node0-card0 up").unwrap();
    assert_eq!(card.bytes, 2_000_000);
    // The second send starts exactly as the first one's last byte leaves (312 us):
    // they never push bytes over the card together, so one at a time.
    assert_eq!(card.peak_concurrent, 1);
}

#[test]
fn spread_placement_pays_for_the_fabric() {
    let packed = baton(&["run", "scenarios/two-boxes.yaml", "--json", "-"]);
    let spread = baton(&["run", "scenarios/two-boxes.yaml", "--json", "-", "--set", "placement=spread"]);
    assert!(packed.status.success() && spread.status.success(), "{}", text(&spread.stderr));
    let (p, s): (serde_json::Value, serde_json::Value) =
        (serde_json::from_slice(&packed.stdout).unwrap(), serde_json::from_slice(&spread.stdout).unwrap());
    // Step times reproduced to the nanosecond by an independent model written
    // from the README alone (max-min sharing with exact fractions; it shares
    // no code with baton): packed 447,066,144 ns, spread 529,996,430 ns.
    assert_eq!((p["step_time_ns"].as_u64(), s["step_time_ns"].as_u64()), (Some(447_066_144), Some(529_996_430)));
    // Spread: stage k on node k mod 2, in that node's next free slot, so
    // stages 0..7 sit on devices [0, 4, 1, 5, 2, 6, 3, 7].
    let placed: Vec<u64> =
        s["devices"].as_array().unwrap().iter().map(|d| d["cluster_device"].as_u64().unwrap()).collect();
    assert_eq!(placed, vec![0, 4, 1, 5, 2, 6, 3, 7]);
    // Bytes per link from the routes in the README: every boundary carries 16
    // micro-batches x 48 MiB each way; a transfer crosses the sender's device
    // link up, then (across nodes) its node's card up and the receiver's
    // node's card down, then the receiver's device link down.
    let each = 16 * 48 * (1u64 << 20);
    let mut want: std::collections::BTreeMap<String, u64> = Default::default();
    for k in 0..7usize {
        for (from, to) in [(k, k + 1), (k + 1, k)] {
            let (a, b) = (placed[from], placed[to]);
            *want.entry(format!("dev{a} up")).or_default() += each;
            if a / 4 != b / 4 {
                *want.entry(format!("node{}-card0 up", a / 4)).or_default() += each;
                *want.entry(format!("node{}-card0 down", b / 4)).or_default() += each;
            }
            *want.entry(format!("dev{b} down")).or_default() += each;
        }
    }
    // Each card carries 7 boundaries' worth: 7 x 16 x 48 MiB = 5,637,144,576 B.
    assert_eq!(want["node0-card0 up"], 5_637_144_576);
    let links = s["links"].as_array().unwrap();
    let got: std::collections::BTreeMap<String, u64> =
        links.iter().map(|l| (l["name"].as_str().unwrap().to_string(), l["bytes"].as_u64().unwrap())).collect();
    assert_eq!(got, want);
    for l in links {
        let ratio = l["busy_ms"].as_f64().unwrap() / s["step_time_ms"].as_f64().unwrap();
        assert!((l["utilization"].as_f64().unwrap() - ratio).abs() < 1e-12, "{l}");
    }
    // The busiest links are the four card directions (each 225.486 ms busy,
    // to within a nanosecond, with up to 4 transfers pushing bytes at once, as
    // the independent model found); the summary names the first.
    let top = links.iter().map(|l| l["busy_ms"].as_f64().unwrap()).fold(0.0, f64::max);
    let busiest: Vec<&serde_json::Value> =
        links.iter().filter(|l| l["busy_ms"].as_f64().unwrap() >= top - 1e-5).collect();
    let names: Vec<&str> = busiest.iter().map(|l| l["name"].as_str().unwrap()).collect();
    assert_eq!(names, vec!["node0-card0 up", "node0-card0 down", "node1-card0 up", "node1-card0 down"]);
    assert!((top - 225.486).abs() < 5e-4, "{top}");
    assert!(busiest.iter().all(|l| l["peak_concurrent"] == 4));
    assert!(text(&spread.stderr).contains("most utilised link: node0-card0 up"), "{}", text(&spread.stderr));
}

#[test]
fn placements_and_cluster_forms_are_checked() {
    let cases: &[(&[&str], &str, &str)] = &[
        (&["placement=[0, 1, 1, 3]"], "placement.2", "already given"),
        (&["placement=[0, 1, 2, 9]"], "placement.3", "from 0 to 3"),
        (&["placement=[0, 1]"], "placement", "4 stages"),
        (&["placement=diagonal"], "placement", "packed, spread"),
        (&["cluster.devices=4"], "cluster", "not both"),
        (&["cluster.node_link.count=0"], "cluster.node_link.count", "at least 1"),
        (&["cluster.device_link.bandwidth=0GB/s"], "cluster.device_link.bandwidth", "more than zero"),
        (&["pipeline.blocking_sends=maybe"], "pipeline.blocking_sends", "true or false"),
    ];
    for (sets, key, needle) in cases {
        let sets: Vec<String> = sets.iter().map(|s| s.to_string()).collect();
        let e = parse(BOXES, "boxes.yaml", "boxes", &sets).unwrap_err();
        assert_eq!(e.key(), Some(*key), "{sets:?}: {e}");
        assert!(e.to_string().contains(needle), "{sets:?}: {e}");
    }
    let s = parse(BOXES, "b.yaml", "b", &["placement=[3, 2, 1, 0]".into()]).unwrap();
    assert_eq!(s.placement, vec![3, 2, 1, 0]);
    let s = parse(BOXES, "b.yaml", "b", &["placement=spread".into()]).unwrap();
    assert_eq!(s.placement, vec![0, 2, 1, 3]);
}

#[test]
fn blocking_sends_hold_the_sender_by_hand() {
    // Worked by hand (no published source): two stages, fill-drain, m = 2,
    // F = 100 ns, B = 200 ns, 50-byte transfers at 1 B/ns, no latency (50 ns).
    // Non-blocking: d0 F0 0-100, F1 100-200; d1 F0 150-250, F1 250-350,
    // B0 350-550, B1 550-750; d0 B0 600-800, B1 800-1000: step 1000.
    // Blocking: d0 F0 0-100, blocked 100-150, F1 150-250, blocked 250-300;
    // d1 F0 150-250, F1 300-400, B0 400-600, blocked 600-650, B1 650-850;
    // d0 B0 650-850, B1 waits for the gradient arriving at 900: 900-1100.
    let t = "model:\n  layers:\n    - { repeat: 2, forward: 100ns, backward: 200ns, activation: 50B }\n\
             cluster: { devices: 2, link: { latency: 0ns, bandwidth: 1GB/s } }\n\
             pipeline: { stages: 2, micro_batches: 2, schedule: fill-drain }\n";
    let free = baton::simulate(&parse(t, "b.yaml", "b", &[]).unwrap()).unwrap();
    assert_eq!(free.report.step_time_ns, 1000);
    let held = baton::simulate(&parse(t, "b.yaml", "b", &["pipeline.blocking_sends=true".into()]).unwrap()).unwrap();
    assert_eq!(held.report.step_time_ns, 1100);
    let d0: Vec<(u64, u64)> = held.trace.ops[0].iter().map(|r| (r.start.as_ns(), r.end.as_ns())).collect();
    assert_eq!(d0, vec![(0, 100), (150, 250), (650, 850), (900, 1100)]);
    let sends: Vec<(u64, u64)> = held
        .report
        .gaps
        .iter()
        .filter(|g| g.device == 0 && g.cause.as_str() == "send")
        .map(|g| (g.start_ns, g.end_ns))
        .collect();
    assert_eq!(sends, vec![(100, 150), (250, 300)]);
}

#[test]
fn charts_show_communication_lanes_unless_hidden() {
    let dir = tempfile::tempdir().unwrap();
    let (with, without) = (dir.path().join("a.svg"), dir.path().join("b.svg"));
    assert!(baton(&["run", "scenarios/two-boxes.yaml", "--svg", with.to_str().unwrap()]).status.success());
    assert!(baton(&["run", "scenarios/two-boxes.yaml", "--svg", without.to_str().unwrap(), "--no-comm-lanes"])
        .status
        .success());
    let a = std::fs::read_to_string(&with).unwrap();
    let b = std::fs::read_to_string(&without).unwrap();
    assert!(a.contains("<title>send: activation of micro-batch 0 from device 0 to device 1"));
    assert!(a.contains("<title>receive: gradient of micro-batch"));
    assert!(!b.contains("<title>send:"));
}

mod unlimited {
    use baton::executor::{simulate, StageCost};
    use baton::link::{LinkSpec, Topology};
    use baton::schedule::{build, ScheduleKind, Shape};
    use proptest::prelude::*;

    proptest! {
        #![proptest_config(ProptestConfig { cases: 48, ..ProptestConfig::default() })]

        /// Without contention (unlimited bandwidth on every link) each transfer
        /// takes exactly its route's latency, whatever shares its links.
        #[test]
        fn transfers_cost_only_latency(
            nodes in 1u32..4, dpn in 1u32..4, m in 1u32..6, seed in 0u64..1000,
            dl_ns in 0u64..5_000, nl_ns in 0u64..20_000, bytes in 0u64..1_000_000_000,
        ) {
            let devices = nodes * dpn;
            // Place the stages on the devices in a scrambled order.
            let mut placement: Vec<u32> = (0..devices).collect();
            placement.sort_by_key(|d| (*d as u64).wrapping_mul(seed | 1).rotate_left(7) ^ seed);
            let p = devices;
            let plan = build(ScheduleKind::OneFOneB, Shape::new(p, m, 1)).unwrap();
            let costs = vec![StageCost::new(baton::engine::SimDuration(1_000), baton::engine::SimDuration(2_000), bytes); p as usize];
            let dl = LinkSpec { latency_ns: dl_ns, bytes_per_s: LinkSpec::UNLIMITED };
            let nl = LinkSpec { latency_ns: nl_ns, bytes_per_s: LinkSpec::UNLIMITED };
            let topo = Topology::two_level(nodes, dpn, dl, nl, 1, &placement);
            // The README's routes: inside a node two device links, across
            // nodes also two cards; stage d runs on cluster device placement[d]
            // (numbered node-major).
            let latency = |a: u32, b: u32| {
                let (x, y) = (placement[a as usize], placement[b as usize]);
                if x / dpn == y / dpn { 2 * dl_ns } else { 2 * dl_ns + 2 * nl_ns }
            };
            let trace = simulate(plan, &costs, topo).unwrap();
            for t in &trace.transfers {
                prop_assert_eq!(t.end.as_ns() - t.start.as_ns(), latency(t.src, t.dst));
                prop_assert_eq!(t.sent, t.start);
            }
        }
    }
}
