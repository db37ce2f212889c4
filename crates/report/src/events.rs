//! The run as trace events, for general-purpose trace viewers.
//!
//! The Trace Event Format is the JSON format documented for Chromium's
//! tracing and read by Perfetto and other trace viewers: an object with a
//! `traceEvents` array. baton writes, per the format (from its published
//! description, as remembered: "complete" events `ph: "X"` with `name`,
//! `cat`, `ts` and `dur` in microseconds, `pid` and `tid`, and free-form
//! `args`; "metadata" events `ph: "M"` naming processes and threads):
//!
//! * one process per data-parallel replica (`replica r`; `pipeline` with
//!   one), and, when there are dedicated parameter servers, one for them;
//! * two threads per device: its ops (`device d`) and its outgoing
//!   transfers (`device d sends`);
//! * a complete event per op (name `F3@1`, category its kind as in the trace
//!   CSV) and per transfer (name `send 0->1`, `sync 0->1` or `tensor 0->1`,
//!   on the sender's transfer thread), with `micro_batch`, `stage`, `bytes`,
//!   `to_device` and `link` (the link that held it back most, if any) in
//!   `args`, and `critical: true` on the ops and sends of the critical path.
//!
//! Times are microseconds with three decimals (whole nanoseconds);
//! `displayTimeUnit` asks viewers to show nanoseconds.

use std::collections::HashSet;
use std::io::{self, Write};

use baton_executor::Trace;

use crate::{Report, ReportError};

fn us(ns: u64) -> String {
    format!("{}.{:03}", ns / 1000, ns % 1000)
}

fn text(s: &str) -> String {
    serde_json::to_string(s).unwrap_or_else(|_| "\"\"".into())
}

/// Writes `trace` (and the critical path of its `report`) as trace events.
pub fn write<W: Write>(trace: &Trace, report: &Report, out: W) -> Result<(), ReportError> {
    let mut w = io::BufWriter::new(out);
    let t0 = trace.start().as_ns();
    let p = trace.plan.shape.stages.max(1);
    let t = trace.tensor.max(1);
    let workers = trace.ops.len() as u32;
    let pipeline_devices = trace.replicas.max(1) * p * t;
    let pid = |device: u32| if device < pipeline_devices { device / t / p } else { trace.replicas.max(1) };
    let critical_ops: HashSet<(u32, u64, u32, u32)> = report
        .critical_path
        .iter()
        .filter(|e| e.kind != "send" && e.kind != "sync")
        .map(|e| (e.device, e.start_ns(), e.micro_batch.unwrap_or(0), e.stage.unwrap_or(0)))
        .collect();
    let critical_sends: HashSet<(u32, u64, u32)> = report
        .critical_path
        .iter()
        .filter(|e| e.kind == "send")
        .map(|e| (e.device, e.start_ns(), e.micro_batch.unwrap_or(0)))
        .collect();
    w.write_all(b"{\"displayTimeUnit\":\"ns\",\"traceEvents\":[\n")?;
    let mut first = true;
    let mut line = |w: &mut io::BufWriter<W>, s: String| -> io::Result<()> {
        if !first {
            w.write_all(b",\n")?;
        }
        first = false;
        w.write_all(s.as_bytes())
    };
    // Processes and threads.
    let mut pids: Vec<u32> = (0..workers).map(pid).collect();
    pids.dedup();
    for &q in &pids {
        let name = if q >= trace.replicas.max(1) {
            "parameter servers".to_string()
        } else if trace.replicas <= 1 {
            "pipeline".to_string()
        } else {
            format!("replica {q}")
        };
        line(
            &mut w,
            format!(
                "{{\"name\":\"process_name\",\"ph\":\"M\",\"pid\":{q},\"tid\":0,\"args\":{{\"name\":{}}}}}",
                text(&name)
            ),
        )?;
        line(&mut w, format!("{{\"name\":\"process_sort_index\",\"ph\":\"M\",\"pid\":{q},\"tid\":0,\"args\":{{\"sort_index\":{q}}}}}"))?;
    }
    for d in 0..workers {
        let q = pid(d);
        for (tid, name) in [(2 * d, format!("device {d}")), (2 * d + 1, format!("device {d} sends"))] {
            line(
                &mut w,
                format!(
                    "{{\"name\":\"thread_name\",\"ph\":\"M\",\"pid\":{q},\"tid\":{tid},\"args\":{{\"name\":{}}}}}",
                    text(&name)
                ),
            )?;
            line(&mut w, format!("{{\"name\":\"thread_sort_index\",\"ph\":\"M\",\"pid\":{q},\"tid\":{tid},\"args\":{{\"sort_index\":{tid}}}}}"))?;
        }
    }
    // Ops.
    for (d, recs) in trace.ops.iter().enumerate() {
        let d = d as u32;
        for r in recs {
            let (start, end) = (r.start.as_ns(), r.end.as_ns());
            let critical = critical_ops.contains(&(d, start, r.op.micro_batch, r.op.stage));
            line(
                &mut w,
                format!(
                    "{{\"name\":\"{}\",\"cat\":\"{}\",\"ph\":\"X\",\"ts\":{},\"dur\":{},\"pid\":{},\"tid\":{},\"args\":{{\"micro_batch\":{},\"stage\":{}{}}}}}",
                    r.op,
                    r.op.kind.as_str(),
                    us(start - t0),
                    us(end - start),
                    pid(d),
                    2 * d,
                    r.op.micro_batch,
                    r.op.stage,
                    if critical { ",\"critical\":true" } else { "" }
                ),
            )?;
        }
    }
    // Transfers, on the sender's transfer thread.
    let link =
        |b: Option<u32>| b.and_then(|l| trace.link_names.get(l as usize)).map_or("null".to_string(), |n| text(n));
    let mut transfer = |w: &mut io::BufWriter<W>,
                        cat: &str,
                        (src, dst): (u32, u32),
                        (start, end): (u64, u64),
                        (mb, stage, bytes): (u32, u32, u64),
                        bottleneck: Option<u32>,
                        critical: bool|
     -> io::Result<()> {
        line(
            w,
            format!(
                "{{\"name\":\"{cat} {src}->{dst}\",\"cat\":\"{cat}\",\"ph\":\"X\",\"ts\":{},\"dur\":{},\"pid\":{},\"tid\":{},\"args\":{{\"micro_batch\":{mb},\"stage\":{stage},\"bytes\":{bytes},\"to_device\":{dst},\"link\":{}{}}}}}",
                us(start - t0),
                us(end - start),
                pid(src),
                2 * src + 1,
                link(bottleneck),
                if critical { ",\"critical\":true" } else { "" }
            ),
        )
    };
    for r in &trace.transfers {
        let critical = critical_sends.contains(&(r.src, r.start.as_ns(), r.micro_batch));
        transfer(
            &mut w,
            "send",
            (r.src, r.dst),
            (r.start.as_ns(), r.end.as_ns()),
            (r.micro_batch, r.from_stage, r.bytes),
            r.bottleneck,
            critical,
        )?;
    }
    for r in &trace.sync_transfers {
        let c = &trace.collectives[r.collective as usize];
        transfer(
            &mut w,
            "sync",
            (r.src, r.dst),
            (r.start.as_ns(), r.end.as_ns()),
            (c.bucket, c.piece, r.bytes),
            r.bottleneck,
            false,
        )?;
    }
    for r in &trace.tensor_transfers {
        transfer(
            &mut w,
            "tensor",
            (r.src, r.dst),
            (r.start.as_ns(), r.end.as_ns()),
            (r.op.micro_batch, r.op.stage, r.bytes),
            None,
            false,
        )?;
    }
    w.write_all(b"\n]}\n")?;
    w.flush()?;
    Ok(())
}
