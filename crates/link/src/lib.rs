//! # baton-link: links between devices and the transfers that share them
//!
//! A [`Topology`] is a set of directed links, each with a latency and a
//! bandwidth, and a route (a list of links) for every ordered pair of devices.
//! A full-duplex cable is two directed links, one per direction, so traffic one
//! way never slows traffic the other way.
//!
//! A [`Network`] carries transfers over a topology as a fluid: a transfer of
//! `b` bytes pushes its bytes at the rate it is granted, and is delivered the
//! route's total latency after its last byte leaves. Rates are max-min fair
//! (water-filling) over all transfers in flight on every directed link they
//! cross; on a single link that is an equal share. Starts and ends are
//! recorded as they happen; [`Network::settle`], called once per simulated
//! instant, re-rates only the transfers connected to a changed link through
//! links that can limit them, and answers when the next last byte leaves (the
//! earliest completion, kept in a tournament tree). The network never
//! touches an event queue: its caller keeps one deadline for it wherever its
//! own events live. The cost of a settle therefore
//! grows with the number of transfers in flight that share links with the
//! change (and their links), not with the size of the topology. Links with
//! unlimited bandwidth ([`LinkSpec::UNLIMITED`]) only add latency.
//!
//! Bytes are tracked as `f64` and a completion deadline is the exact finishing
//! time rounded up to the next whole nanosecond (with a tolerance of 1e-6 ns so
//! that floating-point noise never adds a nanosecond). A transfer alone on its
//! route therefore takes exactly `latency + ceil(bytes * 1e9 / bandwidth)` ns.
//!
//! Modules: [`topology`] (links and routes), [`network`] (transfers in flight
//! and their rates), `tree` (the completion times).
//!
//! ```
//! use baton_engine::SimTime;
//! use baton_link::{LinkSpec, Network, Topology};
//!
//! // Two devices joined by a 1 GB/s link (1 byte per ns) with 500 ns latency.
//! let spec = LinkSpec { latency_ns: 500, bytes_per_s: 1_000_000_000 };
//! let mut net = Network::new(Topology::full_mesh(2, spec));
//! let a = net.start(SimTime(0), 0, 1, 1_000);
//! let b = net.start(SimTime(0), 0, 1, 1_000);
//! // Sharing the link, each gets half: both last bytes leave at 2,000 ns.
//! assert_eq!(net.settle(SimTime(0)), Some(SimTime(2_000)));
//! let mut due = Vec::new();
//! net.take_due(SimTime(2_000), &mut due);
//! assert_eq!(due, vec![a, b]);
//! // Each arrives one latency after its last byte leaves.
//! assert_eq!(net.finish(SimTime(2_000), a).delivered_at, SimTime(2_500));
//! ```
//!
//! This crate deliberately knows nothing about pipelines, stages or schedules,
//! nor about the event queue that drives it: it moves bytes between numbered
//! devices.

#![warn(missing_docs)]

pub mod network;
pub mod topology;
mod tree;

pub use network::{Finished, LinkStats, Network};
pub use topology::{LinkId, LinkSpec, Topology};

/// Handle of a transfer in flight; used as the key of its completion deadline.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub struct TransferId(pub u32);
