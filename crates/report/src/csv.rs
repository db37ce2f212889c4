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

/// One row: start, end, device, kind number, micro-batch, stage, slack.
type Row = (u64, u64, u32, u8, u32, u32, Option<u64>);

/// Writes the CSV trace: header `device,kind,micro_batch,stage,start_ns,end_ns,slack_ns`,
/// one row per operation and per transfer (`kind` is the op kind's name,
/// `forward`, `backward`, `weight`, `encode` or `update`, or `send` for a
/// pipeline transfer, `sync` for a collective's, `tensor` for a tensor
/// group's all-reduce; for a transfer `device` is the sender and `end_ns` the
/// arrival; a send's `stage` is the sending virtual stage, a sync's
/// `micro_batch` the bucket and `stage` the piece, a tensor row's the op's
/// micro-batch and stage; `slack_ns`, for ops and sends, how much later it
/// could end without moving the step's end ([`crate::critical`]), empty for
/// collective and tensor transfers).
/// Rows are ordered by start, then end, device, kind.
pub fn write<W: io::Write>(trace: &Trace, out: W) -> Result<(), ReportError> {
    let (op_slack, transfer_slack) = crate::critical::Graph::of(trace).slack();
    let mut rows: Vec<Row> = Vec::with_capacity(trace.ops.iter().map(Vec::len).sum::<usize>() + trace.transfers.len());
    for (d, recs) in trace.ops.iter().enumerate() {
        for (i, r) in recs.iter().enumerate() {
            rows.push((
                r.start.as_ns(),
                r.end.as_ns(),
                d as u32,
                r.op.kind.index() as u8,
                r.op.micro_batch,
                r.op.stage,
                Some(op_slack[d][i]),
            ));
        }
    }
    for (k, t) in trace.transfers.iter().enumerate() {
        rows.push((t.start.as_ns(), t.end.as_ns(), t.src, SEND, t.micro_batch, t.from_stage, Some(transfer_slack[k])));
    }
    for t in &trace.tensor_transfers {
        rows.push((t.start.as_ns(), t.end.as_ns(), t.src, TENSOR, t.op.micro_batch, t.op.stage, None));
    }
    for t in &trace.sync_transfers {
        let c = &trace.collectives[t.collective as usize];
        rows.push((t.start.as_ns(), t.end.as_ns(), t.src, SYNC, c.bucket, c.piece, None));
    }
    // Each device's ops and each kind of transfer come in time order: a
    // stable sort merges those runs (equal rows are identical, so the order
    // is the same as any sort's).
    rows.sort();
    // Every field is a number or a kind name (letters only): nothing needs
    // quoting, so each line is formatted straight into a buffer written out
    // in large pieces.
    let mut out = out;
    let mut buf: Vec<u8> = Vec::with_capacity(1 << 16);
    buf.extend_from_slice(b"device,kind,micro_batch,stage,start_ns,end_ns,slack_ns\n");
    let mut num = itoa::Buffer::new();
    for (start, end, device, kind, mb, stage, slack) in rows {
        let kind = match kind {
            SEND => "send",
            SYNC => "sync",
            TENSOR => "tensor",
            k => OpKind::ALL[k as usize].as_str(),
        };
        buf.extend_from_slice(num.format(device).as_bytes());
        buf.push(b',');
        buf.extend_from_slice(kind.as_bytes());
        for x in [mb as u64, stage as u64, start, end] {
            buf.push(b',');
            buf.extend_from_slice(num.format(x).as_bytes());
        }
        buf.push(b',');
        if let Some(x) = slack {
            buf.extend_from_slice(num.format(x).as_bytes());
        }
        buf.push(b'\n');
        if buf.len() >= 1 << 16 {
            out.write_all(&buf)?;
            buf.clear();
        }
    }
    out.write_all(&buf)?;
    out.flush()?;
    Ok(())
}
