//! # baton-engine: a generic discrete-event core
//!
//! This crate owns simulated time and the order in which things happen:
//!
//! * [`SimTime`] and [`SimDuration`]: integer nanoseconds in newtypes, so that a
//!   point in time and a length of time cannot be mixed up and no floating-point
//!   clock ever drifts;
//! * [`Scheduler`]: the pending-event set. It holds two queues that share one
//!   sequence counter: a plain queue of fixed events (a [`std::collections::BinaryHeap`],
//!   measured faster than the alternatives in `benches/queue.rs`) and a queue of
//!   *movable* deadlines keyed by a caller-chosen id (the `priority-queue` crate,
//!   whose priority change lets a deadline move without a stale copy left behind;
//!   a transfer's completion moves whenever the bandwidth it is granted changes);
//! * [`run`]: the run loop, which pops the earliest event, ordered by
//!   `(time, sequence number)`, and hands it to a [`Model`];
//! * [`seeded_rng`]: the one place a random generator is made (ChaCha, seeded).
//!
//! Events at equal times are delivered in the order they were scheduled (their
//! sequence number), so the same input always yields the same event order.
//!
//! ```
//! use baton_engine::{run, Fired, Model, Scheduler, SimDuration, SimTime};
//!
//! /// A ping-pong: each ping schedules a pong 5 ns later, three times; a
//! /// movable deadline, set at 12 ns and moved to 3 ns, fires once.
//! struct PingPong {
//!     log: Vec<(u64, &'static str)>,
//! }
//!
//! impl Model for PingPong {
//!     type Event = u32;
//!     type Key = &'static str;
//!     fn handle(&mut self, fired: Fired<u32, &'static str>, sched: &mut Scheduler<u32, &'static str>) {
//!         let now = sched.now().as_ns();
//!         match fired {
//!             Fired::Event(n) => {
//!                 self.log.push((now, if n % 2 == 0 { "ping" } else { "pong" }));
//!                 if n < 2 {
//!                     sched.schedule_in(SimDuration(5), n + 1);
//!                 }
//!             }
//!             Fired::Deadline(key) => self.log.push((now, key)),
//!         }
//!     }
//! }
//!
//! let mut sched = Scheduler::new();
//! sched.schedule(SimTime(0), 0);
//! sched.set_deadline("deadline", SimTime(12));
//! sched.set_deadline("deadline", SimTime(3));
//! let mut model = PingPong { log: Vec::new() };
//! assert_eq!(run(&mut model, &mut sched), SimTime(10));
//! assert_eq!(model.log, vec![(0, "ping"), (3, "deadline"), (5, "pong"), (10, "ping")]);
//! ```
//!
//! It deliberately knows nothing about pipelines, devices, links or schedules.
#![warn(missing_docs)]

use std::cmp::Reverse;
use std::collections::BinaryHeap;
use std::fmt;
use std::hash::{BuildHasherDefault, Hash, Hasher};
use std::ops::{Add, AddAssign, Sub};

use priority_queue::PriorityQueue;
use rand_chacha::rand_core::SeedableRng;

/// The generator every random draw in baton goes through.
pub type SimRng = rand_chacha::ChaCha8Rng;

/// Makes the seeded generator. Reports print `seed` so a run can be repeated.
pub fn seeded_rng(seed: u64) -> SimRng {
    SimRng::seed_from_u64(seed)
}

/// The same seeded generator on another of its streams: draws that must not
/// shift the main stream's (links' variation beside compute's) take them
/// from here, so turning one kind of variation on leaves the other's draws
/// as they were.
pub fn seeded_stream(seed: u64, stream: u64) -> SimRng {
    let mut rng = seeded_rng(seed);
    rng.set_stream(stream);
    rng
}

/// A point in simulated time: nanoseconds since the start of the simulation.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, PartialOrd, Ord, Hash)]
pub struct SimTime(pub u64);

/// A length of simulated time in nanoseconds.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, PartialOrd, Ord, Hash)]
pub struct SimDuration(pub u64);

impl SimTime {
    /// The start of the simulation.
    pub const ZERO: SimTime = SimTime(0);

    /// Nanoseconds since the start.
    pub fn as_ns(self) -> u64 {
        self.0
    }

    /// Milliseconds since the start, for reports.
    pub fn as_ms(self) -> f64 {
        self.0 as f64 / 1e6
    }

    /// `self - earlier`, or zero when `earlier` is later.
    pub fn saturating_since(self, earlier: SimTime) -> SimDuration {
        SimDuration(self.0.saturating_sub(earlier.0))
    }
}

impl SimDuration {
    /// No time at all.
    pub const ZERO: SimDuration = SimDuration(0);

    /// A duration of `ns` nanoseconds.
    pub fn from_ns(ns: u64) -> Self {
        SimDuration(ns)
    }

    /// Nanoseconds.
    pub fn as_ns(self) -> u64 {
        self.0
    }

    /// Milliseconds, for reports.
    pub fn as_ms(self) -> f64 {
        self.0 as f64 / 1e6
    }
}

impl Add<SimDuration> for SimTime {
    type Output = SimTime;
    fn add(self, d: SimDuration) -> SimTime {
        SimTime(self.0.saturating_add(d.0))
    }
}

impl AddAssign<SimDuration> for SimTime {
    fn add_assign(&mut self, d: SimDuration) {
        self.0 = self.0.saturating_add(d.0);
    }
}

impl Sub for SimTime {
    type Output = SimDuration;
    /// Panics in debug builds if `rhs` is later; use [`SimTime::saturating_since`]
    /// where that can happen.
    fn sub(self, rhs: SimTime) -> SimDuration {
        SimDuration(self.0 - rhs.0)
    }
}

impl Add for SimDuration {
    type Output = SimDuration;
    fn add(self, d: SimDuration) -> SimDuration {
        SimDuration(self.0.saturating_add(d.0))
    }
}

impl AddAssign for SimDuration {
    fn add_assign(&mut self, d: SimDuration) {
        self.0 = self.0.saturating_add(d.0);
    }
}

impl std::iter::Sum for SimDuration {
    fn sum<I: Iterator<Item = SimDuration>>(iter: I) -> SimDuration {
        iter.fold(SimDuration::ZERO, |a, b| a + b)
    }
}

impl fmt::Display for SimTime {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}", format_ns(self.0))
    }
}

impl fmt::Display for SimDuration {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}", format_ns(self.0))
    }
}

/// Formats nanoseconds with the largest unit that keeps the number readable:
/// `950 ns`, `12.500 us`, `3.250 ms`, `1.200 s`.
pub fn format_ns(ns: u64) -> String {
    if ns < 1_000 {
        format!("{ns} ns")
    } else if ns < 1_000_000 {
        format!("{:.3} us", ns as f64 / 1e3)
    } else if ns < 1_000_000_000 {
        format!("{:.3} ms", ns as f64 / 1e6)
    } else {
        format!("{:.3} s", ns as f64 / 1e9)
    }
}

/// An entry of the fixed queue. Its key packs `(time, sequence)` into one
/// `u128` (time in the high half), so ordering is a single comparison.
#[derive(Debug)]
struct Fixed<E> {
    key: u128,
    event: E,
}

impl<E> Fixed<E> {
    fn new(at: SimTime, seq: u64, event: E) -> Self {
        Fixed { key: ((at.0 as u128) << 64) | seq as u128, event }
    }
    fn at(&self) -> SimTime {
        SimTime((self.key >> 64) as u64)
    }
    fn seq(&self) -> u64 {
        self.key as u64
    }
}

impl<E> PartialEq for Fixed<E> {
    fn eq(&self, other: &Self) -> bool {
        self.key == other.key
    }
}
impl<E> Eq for Fixed<E> {}
impl<E> PartialOrd for Fixed<E> {
    fn partial_cmp(&self, other: &Self) -> Option<std::cmp::Ordering> {
        Some(self.cmp(other))
    }
}
impl<E> Ord for Fixed<E> {
    fn cmp(&self, other: &Self) -> std::cmp::Ordering {
        self.key.cmp(&other.key)
    }
}

/// A fast, deterministic hasher for the small integer keys of movable
/// deadlines (transfer ids): multiplicative (Fibonacci) hashing. Keys are made
/// by the simulation, not by users, so flooding resistance is not needed.
#[derive(Default, Clone, Copy)]
pub struct KeyHasher(u64);

impl Hasher for KeyHasher {
    fn finish(&self) -> u64 {
        self.0
    }
    fn write(&mut self, bytes: &[u8]) {
        for &b in bytes {
            self.0 = (self.0.rotate_left(8) ^ b as u64).wrapping_mul(0x9E37_79B9_7F4A_7C15);
        }
    }
    fn write_u32(&mut self, i: u32) {
        self.write_u64(i as u64);
    }
    fn write_u64(&mut self, i: u64) {
        self.0 = (self.0 ^ i).wrapping_mul(0x9E37_79B9_7F4A_7C15);
    }
    fn write_usize(&mut self, i: usize) {
        self.write_u64(i as u64);
    }
}

/// What the run loop hands to the model.
#[derive(Debug, PartialEq, Eq)]
pub enum Fired<E, K> {
    /// A fixed event scheduled with [`Scheduler::schedule`].
    Event(E),
    /// A movable deadline scheduled with [`Scheduler::set_deadline`] has come.
    Deadline(K),
}

/// Movable deadlines: a few (the common case: a model keeps one deadline per
/// source, such as its link network) in a short list searched in place;
/// past [`Movable::FEW`] keys, a priority queue.
enum Movable<K: Hash + Eq> {
    Few(Vec<(K, (SimTime, u64))>),
    Many(PriorityQueue<K, Reverse<(SimTime, u64)>, BuildHasherDefault<KeyHasher>>),
}

impl<K: Hash + Eq> Movable<K> {
    const FEW: usize = 8;

    fn len(&self) -> usize {
        match self {
            Movable::Few(v) => v.len(),
            Movable::Many(q) => q.len(),
        }
    }

    fn set(&mut self, key: K, due: (SimTime, u64)) {
        match self {
            Movable::Few(v) => {
                if let Some(e) = v.iter_mut().find(|e| e.0 == key) {
                    e.1 = due;
                    return;
                }
                if v.len() < Self::FEW {
                    v.push((key, due));
                    return;
                }
                let mut q = PriorityQueue::with_default_hasher();
                for (k, d) in v.drain(..) {
                    q.push(k, Reverse(d));
                }
                q.push(key, Reverse(due));
                *self = Movable::Many(q);
            }
            Movable::Many(q) => {
                q.push(key, Reverse(due));
            }
        }
    }

    fn remove(&mut self, key: &K) -> Option<(SimTime, u64)> {
        match self {
            Movable::Few(v) => {
                let i = v.iter().position(|e| e.0 == *key)?;
                Some(v.swap_remove(i).1)
            }
            Movable::Many(q) => q.remove(key).map(|(_, Reverse(d))| d),
        }
    }

    fn get(&self, key: &K) -> Option<(SimTime, u64)> {
        match self {
            Movable::Few(v) => v.iter().find(|e| e.0 == *key).map(|e| e.1),
            Movable::Many(q) => q.get_priority(key).map(|Reverse(d)| *d),
        }
    }

    /// The earliest `(time, sequence)`.
    fn peek(&self) -> Option<(SimTime, u64)> {
        match self {
            Movable::Few(v) => v.iter().map(|e| e.1).min(),
            Movable::Many(q) => q.peek().map(|(_, Reverse(d))| *d),
        }
    }

    fn pop(&mut self) -> Option<(K, (SimTime, u64))> {
        match self {
            Movable::Few(v) => {
                let i = (0..v.len()).min_by_key(|&i| v[i].1)?;
                Some(v.swap_remove(i))
            }
            Movable::Many(q) => q.pop().map(|(k, Reverse(d))| (k, d)),
        }
    }
}

/// The pending-event set: fixed events plus movable deadlines, one order.
pub struct Scheduler<E, K: Hash + Eq> {
    now: SimTime,
    next_seq: u64,
    fixed: BinaryHeap<Reverse<Fixed<E>>>,
    movable: Movable<K>,
    delivered: u64,
}

impl<E, K: Hash + Eq> Default for Scheduler<E, K> {
    fn default() -> Self {
        Self::new()
    }
}

impl<E, K: Hash + Eq> Scheduler<E, K> {
    /// An empty scheduler at time zero.
    pub fn new() -> Self {
        Scheduler {
            now: SimTime::ZERO,
            next_seq: 0,
            fixed: BinaryHeap::new(),
            movable: Movable::Few(Vec::new()),
            delivered: 0,
        }
    }

    /// Pre-sizes the fixed queue.
    pub fn with_capacity(events: usize) -> Self {
        let mut s = Self::new();
        s.fixed.reserve(events);
        s
    }

    /// The time of the event being handled (or of the last one handled).
    pub fn now(&self) -> SimTime {
        self.now
    }

    /// How many events and deadlines have been delivered so far.
    pub fn delivered(&self) -> u64 {
        self.delivered
    }

    /// Number of pending fixed events and deadlines.
    pub fn pending(&self) -> usize {
        self.fixed.len() + self.movable.len()
    }

    fn take_seq(&mut self) -> u64 {
        let s = self.next_seq;
        self.next_seq += 1;
        s
    }

    /// Schedules `event` at `at`. Times before `now` are clamped to `now`:
    /// the past cannot be changed.
    pub fn schedule(&mut self, at: SimTime, event: E) {
        let at = at.max(self.now);
        let seq = self.take_seq();
        self.fixed.push(Reverse(Fixed::new(at, seq, event)));
    }

    /// Schedules `event` after `delay` from now.
    pub fn schedule_in(&mut self, delay: SimDuration, event: E) {
        self.schedule(self.now + delay, event);
    }

    /// Sets (or moves) the deadline of `key` to `at`. A moved deadline takes a
    /// fresh sequence number, as if scheduled anew.
    pub fn set_deadline(&mut self, key: K, at: SimTime) {
        let at = at.max(self.now);
        let seq = self.take_seq();
        self.movable.set(key, (at, seq));
    }

    /// Removes the deadline of `key`, if any; returns when it was due.
    pub fn cancel_deadline(&mut self, key: &K) -> Option<SimTime> {
        self.movable.remove(key).map(|(t, _)| t)
    }

    /// When the deadline of `key` is due, if it is pending.
    pub fn deadline_of(&self, key: &K) -> Option<SimTime> {
        self.movable.get(key).map(|(t, _)| t)
    }

    /// When the earliest pending item is due, if any.
    pub fn peek_time(&self) -> Option<SimTime> {
        let fixed = self.fixed.peek().map(|Reverse(f)| f.at());
        let movable = self.movable.peek().map(|(t, _)| t);
        match (fixed, movable) {
            (Some(a), Some(b)) => Some(a.min(b)),
            (a, b) => a.or(b),
        }
    }

    /// Pops the earliest pending item by `(time, sequence)` and advances `now`.
    pub fn pop(&mut self) -> Option<(SimTime, Fired<E, K>)> {
        let fixed_key = self.fixed.peek().map(|Reverse(f)| (f.at(), f.seq()));
        let movable_key = self.movable.peek();
        let take_fixed = match (fixed_key, movable_key) {
            (None, None) => return None,
            (Some(_), None) => true,
            (None, Some(_)) => false,
            (Some(f), Some(m)) => f < m,
        };
        let (at, fired) = if take_fixed {
            let Reverse(f) = self.fixed.pop()?;
            (f.at(), Fired::Event(f.event))
        } else {
            let (k, (at, _)) = self.movable.pop()?;
            (at, Fired::Deadline(k))
        };
        debug_assert!(at >= self.now, "time went backwards");
        self.now = at;
        self.delivered += 1;
        Some((at, fired))
    }
}

/// A simulation model driven by [`run`].
pub trait Model {
    /// The model's fixed events.
    type Event;
    /// The keys of the model's movable deadlines.
    type Key: Hash + Eq;

    /// Handles one event or deadline at `sched.now()`.
    fn handle(&mut self, fired: Fired<Self::Event, Self::Key>, sched: &mut Scheduler<Self::Event, Self::Key>);
}

/// Runs until no event is pending. Returns the time of the last event.
///
/// The loop ends because every handler only schedules a finite amount of new
/// work; a model that keeps scheduling forever would run forever, so models
/// must guarantee progress (the pipeline executor schedules at most a fixed
/// number of events per operation and per transfer).
pub fn run<M: Model>(model: &mut M, sched: &mut Scheduler<M::Event, M::Key>) -> SimTime {
    while let Some((_, fired)) = sched.pop() {
        model.handle(fired, sched);
    }
    sched.now()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn fixed_events_come_out_by_time_then_sequence() {
        let mut s: Scheduler<&str, u32> = Scheduler::new();
        s.schedule(SimTime(5), "b");
        s.schedule(SimTime(3), "a");
        s.schedule(SimTime(5), "c");
        let order: Vec<_> = std::iter::from_fn(|| s.pop()).collect();
        assert_eq!(
            order,
            vec![(SimTime(3), Fired::Event("a")), (SimTime(5), Fired::Event("b")), (SimTime(5), Fired::Event("c")),]
        );
    }

    #[test]
    fn deadlines_interleave_with_events_and_can_move() {
        let mut s: Scheduler<&str, u32> = Scheduler::new();
        s.set_deadline(7, SimTime(10));
        s.schedule(SimTime(10), "x");
        s.set_deadline(8, SimTime(4));
        // Moving deadline 7 earlier gives it a new sequence number, after "x".
        s.set_deadline(7, SimTime(10));
        assert_eq!(s.deadline_of(&7), Some(SimTime(10)));
        assert_eq!(s.pop(), Some((SimTime(4), Fired::Deadline(8))));
        assert_eq!(s.pop(), Some((SimTime(10), Fired::Event("x"))));
        assert_eq!(s.pop(), Some((SimTime(10), Fired::Deadline(7))));
        assert_eq!(s.pop(), None);
        assert_eq!(s.delivered(), 3);
    }

    #[test]
    fn cancelled_deadline_never_fires_and_past_is_clamped() {
        let mut s: Scheduler<(), u32> = Scheduler::new();
        s.schedule(SimTime(10), ());
        s.set_deadline(1, SimTime(20));
        assert_eq!(s.cancel_deadline(&1), Some(SimTime(20)));
        assert_eq!(s.pop(), Some((SimTime(10), Fired::Event(()))));
        s.schedule(SimTime(2), ());
        assert_eq!(s.pop(), Some((SimTime(10), Fired::Event(()))));
        assert_eq!(s.pop(), None);
    }

    #[test]
    fn many_deadlines_keep_the_same_order_as_a_plain_list() {
        // Past a few keys the deadlines move to a priority queue; the order
        // of (time, sequence) must not change. A plain list is the model.
        let mut s: Scheduler<u32, u32> = Scheduler::new();
        let mut model: Vec<(u32, u64, u64)> = Vec::new(); // (key, time, seq)
        let mut seq = 0u64;
        for round in 0..3u64 {
            for k in 0..20u32 {
                let at = (k as u64 * 7 + round * 13) % 23;
                s.set_deadline(k, SimTime(at));
                model.retain(|e| e.0 != k);
                model.push((k, at, seq));
                seq += 1;
                if k % 5 == 4 {
                    assert_eq!(
                        s.cancel_deadline(&(k - 1)).map(|t| t.0),
                        model.iter().find(|e| e.0 == k - 1).map(|e| e.1)
                    );
                    model.retain(|e| e.0 != k - 1);
                }
            }
        }
        model.sort_by_key(|e| (e.1, e.2));
        let want: Vec<(SimTime, Fired<u32, u32>)> =
            model.iter().map(|e| (SimTime(e.1), Fired::Deadline(e.0))).collect();
        let got: Vec<_> = std::iter::from_fn(|| s.pop()).collect();
        assert_eq!(got, want);
    }

    #[test]
    fn run_loop_drives_a_model_to_completion() {
        // A countdown that reschedules itself: 3 steps, 5 ns apart.
        struct Countdown(u32, Vec<SimTime>);
        impl Model for Countdown {
            type Event = ();
            type Key = u8;
            fn handle(&mut self, _: Fired<(), u8>, s: &mut Scheduler<(), u8>) {
                self.1.push(s.now());
                if self.0 > 0 {
                    self.0 -= 1;
                    s.schedule_in(SimDuration(5), ());
                }
            }
        }
        let mut m = Countdown(3, vec![]);
        let mut s = Scheduler::new();
        s.schedule(SimTime(1), ());
        let end = run(&mut m, &mut s);
        assert_eq!(end, SimTime(16));
        assert_eq!(m.1, vec![SimTime(1), SimTime(6), SimTime(11), SimTime(16)]);
    }

    #[test]
    fn formats_with_readable_units() {
        assert_eq!(format_ns(950), "950 ns");
        assert_eq!(format_ns(12_500), "12.500 us");
        assert_eq!(format_ns(3_250_000), "3.250 ms");
        assert_eq!(format_ns(1_200_000_000), "1.200 s");
    }

    #[test]
    fn same_seed_same_draws() {
        use rand::RngExt;
        let mut a = seeded_rng(42);
        let mut b = seeded_rng(42);
        let xs: Vec<u32> = (0..4).map(|_| a.random_range(0..1000)).collect();
        let ys: Vec<u32> = (0..4).map(|_| b.random_range(0..1000)).collect();
        assert_eq!(xs, ys);
    }
}
