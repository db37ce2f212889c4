//! The CSV trace: every operation and transfer of a step, one row each.

use std::io;

use baton_executor::Trace;
use baton_schedule::OpKind;

use crate::ReportError;

/// The kind number of a transfer row: after every op kind.
const SEND: u8 = OpKind::ALL.len() as u8;
/// The kind number of a collective's transfer row.
const SYNC: u8 = SEND + 1;
/// The kind number of a tensor-parallel all-reduce's transfer row.
const TENSOR: u8 = SEND + 2;

/// Writes the CSV trace: header `device,kind,micro_batch,stage,start_ns,end_ns`,
/// one row per operation and per transfer (`kind` is the op kind's name,
/// `forward`, `backward`, `weight`, `encode` or `update`, or `send` for a
/// pipeline transfer, `sync` for a collective's, `tensor` for a tensor
/// group's all-reduce; for a transfer `device` is the sender and `end_ns` the
/// arrival; a send's `stage` is the sending virtual stage, a sync's
/// `micro_batch` the bucket and `stage` the piece, a tensor row's the op's
/// micro-batch and stage).
/// Rows are ordered by start, then end, device, kind.
pub fn write<W: io::Write>(trace: &Trace, out: W) -> Result<(), ReportError> {
    let mut rows: Vec<(u64, u64, u32, u8, u32, u32)> =
        Vec::with_capacity(trace.ops.iter().map(Vec::len).sum::<usize>() + trace.transfers.len());
    for (d, recs) in trace.ops.iter().enumerate() {
        for r in recs {
            rows.push((
                r.start.as_ns(),
                r.end.as_ns(),
                d as u32,
                r.op.kind.index() as u8,
                r.op.micro_batch,
                r.op.stage,
            ));
        }
    }
    for t in &trace.transfers {
        rows.push((t.start.as_ns(), t.end.as_ns(), t.src, SEND, t.micro_batch, t.from_stage));
    }
    for t in &trace.tensor_transfers {
        rows.push((t.start.as_ns(), t.end.as_ns(), t.src, TENSOR, t.op.micro_batch, t.op.stage));
    }
    for t in &trace.sync_transfers {
        let c = &trace.collectives[t.collective as usize];
        rows.push((t.start.as_ns(), t.end.as_ns(), t.src, SYNC, c.bucket, c.piece));
    }
    rows.sort_unstable();
    let mut w = ::csv::Writer::from_writer(out);
    w.write_record(["device", "kind", "micro_batch", "stage", "start_ns", "end_ns"])?;
    for (start, end, device, kind, mb, stage) in rows {
        let kind = match kind {
            SEND => "send",
            SYNC => "sync",
            TENSOR => "tensor",
            k => OpKind::ALL[k as usize].as_str(),
        };
        w.serialize((device, kind, mb, stage, start, end))?;
    }
    w.flush()?;
    Ok(())
}
