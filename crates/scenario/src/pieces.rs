//! What a run of layers costs as one piece of the pipeline: the one place the
//! recomputation rule and the tied-weights rule are written. Sums come from
//! prefix sums, so any piece costs O(1) to price, which the split search
//! needs.

use crate::{LayerCost, Recompute};

/// The summed cost of one piece of the model (one virtual stage).
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Piece {
    /// Index of its first layer.
    pub first_layer: usize,
    /// How many layers it holds.
    pub layers: usize,
    /// Forward time per micro-batch.
    pub forward_ns: u64,
    /// Backward time per micro-batch (with full recomputation, the forward
    /// run again plus the backward).
    pub backward_ns: u64,
    /// The weight-gradient part of `backward_ns` (W).
    pub weight_ns: u64,
    /// Its last layer's activation: what it sends on per micro-batch.
    pub send_bytes: u64,
    /// Bytes held per micro-batch from the forward's start to the backward's
    /// end: the layers' stashes, or with full recomputation the piece's input.
    pub stash_bytes: u64,
    /// Bytes held per micro-batch from a split backward's B end to its W
    /// end: the layers' weight stashes (with full recomputation too, since W
    /// needs what B recomputed).
    pub weight_stash_bytes: u64,
    /// Its layers' parameters, plus their tied parameters when the piece
    /// runs on another device than the first layer (a copy of the shared
    /// weights; see [`LayerCost::tied_params`]).
    pub params: u64,
}

/// Prices any run of layers `a..b` as piece `k` (on device `k mod p`).
///
/// * Time: the layers' forward and backward times; with full recomputation
///   the backward also runs the piece's forward again (common practice, no
///   source).
/// * Stash: the layers' stashes; with full recomputation only the piece's
///   input, the previous layer's activation (nothing for the first piece,
///   whose input is token ids).
/// * Parameters: the layers' own, plus their `tied_params` on any device but
///   device 0, which holds the first layer the weights are shared with.
#[derive(Clone, Debug)]
pub struct PieceCosts {
    stages: usize,
    recompute: bool,
    forward: Vec<u128>,
    backward: Vec<u128>,
    weight: Vec<u128>,
    stash: Vec<u128>,
    weight_stash: Vec<u128>,
    params: Vec<u128>,
    tied: Vec<u128>,
    activation: Vec<u64>,
}

fn prefix(layers: &[LayerCost], f: impl Fn(&LayerCost) -> u64) -> Vec<u128> {
    let mut v = Vec::with_capacity(layers.len() + 1);
    let mut sum = 0u128;
    v.push(0);
    for l in layers {
        sum += f(l) as u128;
        v.push(sum);
    }
    v
}

fn clamp(x: u128) -> u64 {
    x.min(u64::MAX as u128) as u64
}

impl PieceCosts {
    /// The prices of `layers` split over `stages` devices.
    pub fn new(layers: &[LayerCost], stages: u32, recompute: Recompute) -> Self {
        PieceCosts {
            stages: stages.max(1) as usize,
            recompute: recompute == Recompute::Full,
            forward: prefix(layers, |l| l.forward_ns),
            backward: prefix(layers, |l| l.backward_ns),
            weight: prefix(layers, |l| l.weight_ns),
            stash: prefix(layers, |l| l.stash_bytes),
            weight_stash: prefix(layers, |l| l.weight_stash_bytes),
            params: prefix(layers, |l| l.params),
            tied: prefix(layers, |l| l.tied_params),
            activation: layers.iter().map(|l| l.activation_bytes).collect(),
        }
    }

    /// Layers in the model.
    pub fn layers(&self) -> usize {
        self.activation.len()
    }

    /// Forward plus backward time per micro-batch of layers `a..b` as a piece.
    pub fn time_ns(&self, a: usize, b: usize) -> u128 {
        let forward = self.forward[b] - self.forward[a];
        let backward = self.backward[b] - self.backward[a];
        forward + backward + if self.recompute { forward } else { 0 }
    }

    /// Bytes piece `a..b` keeps per micro-batch in flight.
    pub fn stash_bytes(&self, a: usize, b: usize) -> u128 {
        if self.recompute {
            if a == 0 {
                0
            } else {
                self.activation[a - 1] as u128
            }
        } else {
            self.stash[b] - self.stash[a]
        }
    }

    /// Bytes piece `a..b` keeps per micro-batch between a split backward's B
    /// and W.
    pub fn weight_stash_bytes(&self, a: usize, b: usize) -> u128 {
        self.weight_stash[b] - self.weight_stash[a]
    }

    /// Parameters piece `k` over layers `a..b` holds (its copies included).
    pub fn params(&self, k: usize, a: usize, b: usize) -> u128 {
        let own = self.params[b] - self.params[a];
        if k % self.stages != 0 {
            own + self.tied[b] - self.tied[a]
        } else {
            own
        }
    }

    /// Whether a piece's price depends only on its layers, not on its
    /// position: no recomputation (whose stash is the layer before) and no
    /// tied weights (whose copy depends on the device).
    pub fn position_independent(&self) -> bool {
        !self.recompute && self.tied.last().is_none_or(|&t| t == 0)
    }

    /// Piece `k` over layers `a..b`, summed.
    pub fn piece(&self, k: usize, a: usize, b: usize) -> Piece {
        let forward = self.forward[b] - self.forward[a];
        let backward = self.backward[b] - self.backward[a];
        Piece {
            first_layer: a,
            layers: b - a,
            forward_ns: clamp(forward),
            backward_ns: clamp(backward + if self.recompute { forward } else { 0 }),
            weight_ns: clamp(self.weight[b] - self.weight[a]),
            send_bytes: if b > a { self.activation[b - 1] } else { 0 },
            stash_bytes: clamp(self.stash_bytes(a, b)),
            weight_stash_bytes: clamp(self.weight_stash_bytes(a, b)),
            params: clamp(self.params(k, a, b)),
        }
    }

    /// The pieces `split` (layers per piece, covering the model) makes.
    pub fn pieces_of(&self, split: &[u32]) -> Vec<Piece> {
        let mut first = 0usize;
        split
            .iter()
            .enumerate()
            .map(|(k, &n)| {
                let piece = self.piece(k, first, first + n as usize);
                first += n as usize;
                piece
            })
            .collect()
    }
}
