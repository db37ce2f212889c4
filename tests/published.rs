//! Checks of whole simulated steps against published results and against
//! cases worked out by hand. Each check names its source.
//!
//! "Bubble fraction" has two definitions in the literature: idle / total time
//! (GPipe, zero-bubble papers) and bubble / ideal time (Narayanan et al. 2021).
//! Each test says which it checks; baton reports the first.

use baton::scenario::{parse, Scenario};

/// A scenario of `layers` identical layers (forward `f_ns`, backward `b_ns`),
/// split evenly, on a flat cluster whose links cost nothing (zero latency, and
/// activations of zero bytes).
fn uniform(p: u32, m: u32, v: u32, schedule: &str, layers: u32, f_ns: u64, b_ns: u64) -> Scenario {
    let text = format!(
        "title: check\nmodel:\n  layers:\n    - {{ name: l, repeat: {layers}, forward: {f_ns}ns, backward: {b_ns}ns, activation: 0B }}\n\
         cluster:\n  devices: {p}\n  link: {{ latency: 0ns, bandwidth: 1GB/s }}\n\
         pipeline:\n  stages: {p}\n  split: even\n  micro_batches: {m}\n  schedule: {schedule}\n  chunks: {v}\n"
    );
    parse(&text, "check.yaml", "check", &[]).unwrap()
}

#[test]
fn fill_drain_bubble_matches_gpipe() {
    // Huang et al., "GPipe: Efficient Training of Giant Neural Networks using
    // Pipeline Parallelism", NeurIPS 2019, sec. 2.3: with K stages of equal time
    // and M micro-batches the bubble is (K-1)/(M+K-1) of the total time; exact
    // when links cost nothing. p=4, m=8 -> 3/11.
    for (p, m) in [(4u32, 8u32), (4, 16), (4, 1), (2, 3), (8, 32), (1, 5)] {
        let s = uniform(p, m, 1, "fill-drain", p, 1_000, 2_000);
        let r = baton::simulate(&s).unwrap().report;
        // Step = (m + p - 1) slots of forward then (m + p - 1) of backward.
        assert_eq!(r.step_time_ns, (m + p - 1) as u64 * 3_000, "p={p} m={m}");
        let expected = (p - 1) as f64 / (m + p - 1) as f64;
        assert!((r.bubble_fraction - expected).abs() < 1e-12, "p={p} m={m}: {} vs {expected}", r.bubble_fraction);
    }
    let r = baton::simulate(&uniform(4, 8, 1, "fill-drain", 4, 1_000, 2_000)).unwrap().report;
    assert!((r.bubble_fraction - 3.0 / 11.0).abs() < 1e-12);
}

#[test]
fn one_f_one_b_has_the_fill_drain_bubble_and_less_memory() {
    // Narayanan et al., "Efficient Large-Scale Language Model Training on GPU
    // Clusters Using Megatron-LM", SC 2021, sec. 2.2.1: 1F1B has the same bubble
    // time as fill-drain; activations are stashed for at most p micro-batches
    // instead of m. Narayanan et al., "Memory-Efficient Pipeline-Parallel DNN
    // Training", ICML 2021, sec. 3: in-flight micro-batches per stage at most the
    // pipeline depth. On device d (0-based): min(p - d, m); fill-drain: m.
    for (p, m) in [(4u32, 8u32), (4, 2), (3, 7), (6, 24)] {
        let fd = baton::simulate(&uniform(p, m, 1, "fill-drain", p, 1_000, 2_000)).unwrap().report;
        let ob = baton::simulate(&uniform(p, m, 1, "1f1b", p, 1_000, 2_000)).unwrap().report;
        assert_eq!(ob.step_time_ns, fd.step_time_ns, "p={p} m={m}");
        let expected = (p - 1) as f64 / (m + p - 1) as f64;
        assert!((ob.bubble_fraction - expected).abs() < 1e-12);
        let peaks: Vec<u32> = ob.devices.iter().map(|d| d.peak_activations).collect();
        let want: Vec<u32> = (0..p).map(|d| (p - d).min(m)).collect();
        assert_eq!(peaks, want, "1F1B p={p} m={m}");
        assert!(fd.devices.iter().all(|d| d.peak_activations == m), "fill-drain holds all m");
    }
    // The worked values: p=4, m=8 -> [4, 3, 2, 1] versus [8, 8, 8, 8].
    let ob = baton::simulate(&uniform(4, 8, 1, "1f1b", 4, 1_000, 2_000)).unwrap().report;
    assert_eq!(ob.devices.iter().map(|d| d.peak_activations).collect::<Vec<_>>(), vec![4, 3, 2, 1]);
}

#[test]
fn interleaved_bubble_matches_megatron_formula() {
    // Narayanan et al., SC 2021, sec. 2.2.2: with v model chunks per device the
    // bubble time is (p-1)(t_f+t_b)/v, so bubble / ideal = (p-1)/(v*m), for m a
    // multiple of p. p=4, m=8, v=2 -> 3/16 of ideal (= 3/19 of total).
    for (p, m, v) in [(4u32, 8u32, 2u32), (4, 4, 2), (4, 16, 4), (2, 6, 3), (8, 64, 4), (3, 9, 2)] {
        // Chunk times t_f/v and t_b/v: a whole stage takes 1200 + 2400 ns.
        let s = uniform(p, m, v, "interleaved", p * v, 1_200 / v as u64, 2_400 / v as u64);
        let r = baton::simulate(&s).unwrap().report;
        let ideal = m as u64 * 3_600;
        let bubble = r.step_time_ns - ideal;
        // bubble / ideal = (p-1)/(v m)  <=>  bubble * v * m = (p-1) * ideal.
        assert_eq!(bubble * (v * m) as u64, (p - 1) as u64 * ideal, "p={p} m={m} v={v}");
    }
    let r = baton::simulate(&uniform(4, 8, 2, "interleaved", 8, 600, 1_200)).unwrap().report;
    assert!((r.bubble_fraction - 3.0 / 19.0).abs() < 1e-12, "3/16 of ideal is 3/19 of total");
}

#[test]
fn unbalanced_split_worked_by_hand() {
    // Worked by hand (no published source): two stages, fill-drain, m = 2, free
    // links. Layers A (F 1000, B 2000) and B (F 3000, B 6000), one per stage.
    // Device 0: F0 0-1000, F1 1000-2000.
    // Device 1: F0 1000-4000, F1 4000-7000, B0 7000-13000, B1 13000-19000.
    // Device 0: B0 needs B0@1 (ends 13000): 13000-15000; B1 19000-21000.
    // Step 21000. Device 0 busy 6000, idle 15000 (2000-13000 waiting for the
    // gradient of micro-batch 0, 15000-19000 for micro-batch 1).
    // Device 1 busy 18000, idle 3000: fill 0-1000, drain 19000-21000.
    let text = "model:\n  layers:\n    - { name: a, forward: 1us, backward: 2us, activation: 0B }\n    - { name: b, forward: 3us, backward: 6us, activation: 0B }\n\
                cluster: { devices: 2, link: { latency: 0ns, bandwidth: 1GB/s } }\n\
                pipeline: { stages: 2, micro_batches: 2, schedule: fill-drain }\n";
    let s = parse(text, "hand.yaml", "hand", &[]).unwrap();
    let r = baton::simulate(&s).unwrap().report;
    assert_eq!(r.step_time_ns, 21_000);
    assert_eq!((r.devices[0].busy_ns, r.devices[0].idle_ns), (6_000, 15_000));
    assert_eq!((r.devices[1].busy_ns, r.devices[1].idle_ns), (18_000, 3_000));
    let gaps0: Vec<(u64, u64, &str)> =
        r.gaps.iter().filter(|g| g.device == 0).map(|g| (g.start_ns, g.end_ns, g.cause.as_str())).collect();
    assert_eq!(gaps0, vec![(2_000, 13_000, "gradient"), (15_000, 19_000, "gradient")]);
    assert!((r.bubble_fraction - 18_000.0 / 42_000.0).abs() < 1e-12);
}

#[test]
fn link_latency_and_bandwidth_worked_by_hand() {
    // Worked by hand (no published source): two stages, 1F1B, m = 2; every
    // layer F 100 us, B 200 us; activation 4 MB over 2 GB/s (2000 B/us) with
    // 10 us latency. Alone, a transfer takes 2000 us + 10 us.
    // Device 0 runs F0 F1 B0 B1 (warm-up of 1); device 1 runs F0 B0 F1 B1.
    // Activations on link 0->1, which the two transfers share equally:
    //   F0's bytes 100-200 alone: 200,000 B sent, 3,800,000 left.
    //   From 200 both at 1000 B/us: F0's last byte at 200 + 3800 = 4000; F1 has
    //   200,000 left, alone again: +100 -> 4100. Arrivals 4010 and 4110.
    // Device 1: F0 4010-4110, B0 4110-4310, F1 4310-4410, B1 4410-4610.
    // Gradients on link 1->0:
    //   B0's bytes 4310-4610 alone: 600,000 sent, 3,400,000 left.
    //   From 4610 both at 1000 B/us: B0's last byte at 4610 + 3400 = 8010; B1 has
    //   600,000 left, alone: +300 -> 8310. Arrivals 8020 and 8320.
    // Device 0: B0 8020-8220, B1 8320-8520. Step 8520 us.
    let text = "model:\n  layers:\n    - { name: l, repeat: 2, forward: 100us, backward: 200us, activation: 4MB }\n\
                cluster: { devices: 2, link: { latency: 10us, bandwidth: 2GB/s } }\n\
                pipeline: { stages: 2, micro_batches: 2, schedule: 1f1b }\n";
    let s = parse(text, "link.yaml", "link", &[]).unwrap();
    let out = baton::simulate(&s).unwrap();
    let ends: Vec<u64> = out.trace.transfers.iter().map(|t| t.end.as_ns() / 1_000).collect();
    assert_eq!(ends, vec![4_010, 4_110, 8_020, 8_320]);
    assert_eq!(out.report.step_time_ns, 8_520_000);
    let d0: Vec<(u64, u64)> =
        out.trace.ops[0].iter().map(|r| (r.start.as_ns() / 1_000, r.end.as_ns() / 1_000)).collect();
    assert_eq!(d0, vec![(0, 100), (100, 200), (8_020, 8_220), (8_320, 8_520)]);
}

#[test]
fn gradient_carries_the_size_of_the_boundary_it_crosses() {
    // Worked by hand (no published source). Two layers on two devices,
    // fill-drain, m = 1: `a` (F 100 us, B 200 us, activation 1 MB) on device 0,
    // `b` (same times, activation 100 MB) on device 1; link 10 us, 1 GB/s
    // (1,000 B/us). The only boundary is after `a`, so both the activation
    // and the gradient that comes back carry 1 MB; `b`'s 100 MB never crosses.
    //   F0@0 0-100; activation 1,000,000 B / 1,000 B/us + 10 = 1,010 us: 100-1110;
    //   F0@1 1110-1210; B0@1 1210-1410; gradient 1,010 us: 1410-2420;
    //   B0@0 2420-2620. Step 2,620 us.
    let text = "model:\n  layers:\n    - { name: a, forward: 100us, backward: 200us, activation: 1MB }\n\
                \x20   - { name: b, forward: 100us, backward: 200us, activation: 100MB }\n\
                cluster: { devices: 2, link: { latency: 10us, bandwidth: 1GB/s } }\n\
                pipeline: { stages: 2, micro_batches: 1, schedule: fill-drain }\n";
    let s = parse(text, "grad.yaml", "grad", &[]).unwrap();
    let out = baton::simulate(&s).unwrap();
    assert_eq!(out.report.step_time_ns, 2_620_000);
    let transfers: Vec<(u64, u64, u64)> =
        out.trace.transfers.iter().map(|t| (t.bytes, t.start.as_ns() / 1_000, t.end.as_ns() / 1_000)).collect();
    assert_eq!(transfers, vec![(1_000_000, 100, 1_110), (1_000_000, 1_410, 2_420)]);
}

/// Four stages of one layer each with forward, backward (B + W) and weight
/// (W) times in microseconds; links cost nothing.
fn zero_bubble_case(schedule: &str, m: u32, f_us: u64, b_us: u64, w_us: u64) -> baton::report::Report {
    let text = format!(
        "model:\n  layers:\n    - {{ name: l, repeat: 4, forward: {f_us}us, backward: {}us, weight: {w_us}us, activation: 0B }}\n\
         cluster:\n  devices: 4\n  link: {{ latency: 0ns, bandwidth: 1GB/s }}\n\
         pipeline:\n  stages: 4\n  micro_batches: {m}\n  schedule: {schedule}\n",
        b_us + w_us
    );
    baton::simulate(&parse(&text, "zb.yaml", "zb", &[]).unwrap()).unwrap().report
}

#[test]
fn zero_bubble_schedules_meet_the_papers_bubbles() {
    // Qi, Wan, Huang, Lin, "Zero Bubble Pipeline Parallelism", ICLR 2024,
    // sec. 2-3 (bubble = idle time of the busiest device's step, here the
    // step minus the m (T_F + T_B + T_W) of work): 1F1B (p-1)(T_F+T_B+T_W),
    // ZB-H1 (p-1)(T_F+T_B-T_W). p = 4, m = 12, every time 1 unit (1 us):
    // 1F1B 36 + 9 = 45, ZB-H1 36 + 3 = 39. ZB-H2's (p-1)(T_F+T_B-2T_W) = 0
    // holds in the steady state of unflushed steps; one flushed step still
    // starts the last device (p-1) T_F late: 36 + 3 = 39 (worked out from
    // the schedules' shapes, as the references note).
    assert_eq!(zero_bubble_case("1f1b", 12, 1, 1, 1).step_time_ns, 45_000);
    assert_eq!(zero_bubble_case("zb-h1", 12, 1, 1, 1).step_time_ns, 39_000);
    assert_eq!(zero_bubble_case("zb-h2", 12, 1, 1, 1).step_time_ns, 39_000);
    // T_F = 2, T_B = 3, T_W = 1, m = 12: work 72; the formulas give bubbles
    // 18, 12 and 9. One flushed step: 1F1B 90 and ZB-H1 84 as the formulas
    // say; ZB-H2 81, its formula reached in one step because its bubble 9
    // exceeds the slant (p-1) T_F = 6 (the references' worked values).
    assert_eq!(zero_bubble_case("1f1b", 12, 2, 3, 1).step_time_ns, 90_000);
    assert_eq!(zero_bubble_case("zb-h1", 12, 2, 3, 1).step_time_ns, 84_000);
    assert_eq!(zero_bubble_case("zb-h2", 12, 2, 3, 1).step_time_ns, 81_000);
}

#[test]
fn zero_bubble_schedules_hold_the_papers_peak_micro_batches() {
    // Same paper, sec. 3: ZB-H1 keeps 1F1B's peak, p micro-batches on the
    // first device (from a forward to its input-gradient pass); ZB-H2
    // allows 2p - 1.
    let h1 = zero_bubble_case("zb-h1", 12, 1, 1, 1);
    let h2 = zero_bubble_case("zb-h2", 12, 1, 1, 1);
    let f1 = zero_bubble_case("1f1b", 12, 1, 1, 1);
    assert_eq!(h1.devices[0].peak_activations, 4);
    assert_eq!(f1.devices[0].peak_activations, 4);
    assert_eq!(h2.devices[0].peak_activations, 7);
    // W passes run as ops of their own: 12 of 1 us on each device.
    assert!(h1.ops == 3 * 12 * 4 && f1.ops == 2 * 12 * 4);
    assert!(h1.devices.iter().all(|d| (d.weight_ms - 0.012).abs() < 1e-12));
    assert!(f1.devices.iter().all(|d| d.weight_ms == 0.0));
}
