//! # baton-model: what a network's layers cost
//!
//! The per-layer table every simulation starts from ([`LayerCost`]: forward
//! and backward time, bytes sent on, bytes stashed until the backward pass,
//! parameters), and the published formulas that derive it from a
//! transformer's shape and an accelerator's speed ([`Transformer`]), plus the
//! memory a device needs for its share of the model ([`state_bytes`]).
//!
//! Formulas (16-bit activations and weights):
//! * forward FLOPs of a transformer layer `24 b s h^2 + 4 b s^2 h`, of the
//!   logit layer `2 b s h V`; backward twice the forward (Narayanan et al.,
//!   "Efficient Large-Scale Language Model Training on GPU Clusters Using
//!   Megatron-LM", SC 2021, appendix and eq. 3);
//! * parameters `12 h^2 + 13 h` per transformer layer and `(V + s) h` for the
//!   token and position embeddings, the logit layer sharing the token
//!   embedding's weights (same paper, eq. 2);
//! * activation sent between stages `2 s b h` bytes; activations stashed per
//!   transformer layer `s b h (34 + 5 a s / h)` bytes (Korthikanti et al.,
//!   "Reducing Activation Recomputation in Large Transformer Models", MLSys
//!   2023, eq. 1);
//! * time = FLOPs / (peak FLOP/s x efficiency);
//! * model state: parameters x bytes per parameter, 16 for mixed-precision
//!   Adam (Rajbhandari et al., "ZeRO", SC 2020, sec. 3.1).
//!
//! Those are the original architecture's ([`Transformer::new`]). Its
//! variants (a feed-forward width other than `4 h`, a gated FFN, grouped-query
//! attention, flash attention, an untied output layer, activations of other
//! than 2 bytes) change the terms as derived in each method's documentation.
//!
//! It deliberately knows nothing about files, schedules or simulated time.
#![warn(missing_docs)]

/// One layer's costs per micro-batch.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct LayerCost {
    /// Its name in tables and charts.
    pub name: String,
    /// Forward time of one micro-batch.
    pub forward_ns: u64,
    /// Backward time of one micro-batch.
    pub backward_ns: u64,
    /// Bytes the layer sends on (and receives back as gradient).
    pub activation_bytes: u64,
    /// Bytes kept from the forward pass until the backward pass.
    pub stash_bytes: u64,
    /// The layer's own parameters.
    pub params: u64,
    /// Parameters the layer shares with the model's first layer (tied
    /// weights: a transformer's output layer uses the token embedding's
    /// matrix). Not counted in `params`; a device other than the first
    /// layer's that runs this layer keeps its own copy, with its gradients
    /// and optimizer state.
    pub tied_params: u64,
    /// With tensor parallelism: bytes of each of the layer's two
    /// all-reduces per pass (forward and backward); 0: none.
    pub tensor_bytes: u64,
    /// With tensor parallelism: the share of the forward before its first
    /// all-reduce, as (numerator, denominator) (a transformer layer's
    /// attention part; one half for a layer given by its times).
    pub forward_split: (u64, u64),
    /// The share of the backward before its first all-reduce (a transformer
    /// layer's MLP part, since the backward runs the layer in reverse).
    pub backward_split: (u64, u64),
    /// The weight-gradient part of the backward (W), run apart by the
    /// zero-bubble schedules; the rest of `backward_ns` is the input
    /// gradient (B).
    pub weight_ns: u64,
    /// Bytes a split backward keeps per micro-batch from the end of B until
    /// the end of W: what the weight-gradient products still need (their
    /// inputs and output gradients). The cautious default is the whole stash.
    pub weight_stash_bytes: u64,
}

impl LayerCost {
    /// A layer with these costs and no tensor-parallel communication.
    pub fn new(name: impl Into<String>, forward_ns: u64, backward_ns: u64, activation_bytes: u64) -> Self {
        LayerCost {
            name: name.into(),
            forward_ns,
            backward_ns,
            activation_bytes,
            stash_bytes: activation_bytes,
            params: 0,
            tied_params: 0,
            tensor_bytes: 0,
            forward_split: (1, 2),
            backward_split: (1, 2),
            weight_ns: backward_ns / 2,
            weight_stash_bytes: activation_bytes,
        }
    }

    /// What one device of a tensor-parallel group of `t` holds and does for
    /// this layer: times, activation, stash and parameters divided by `t`,
    /// rounded up (the times are an idealisation: perfect scaling of the
    /// compute); the all-reduce size is the whole layer's.
    pub fn per_tensor_rank(&self, t: u64) -> LayerCost {
        let t = t.max(1);
        LayerCost {
            name: self.name.clone(),
            forward_ns: self.forward_ns.div_ceil(t),
            backward_ns: self.backward_ns.div_ceil(t),
            weight_ns: self.weight_ns.div_ceil(t).min(self.backward_ns.div_ceil(t)),
            activation_bytes: self.activation_bytes.div_ceil(t),
            stash_bytes: self.stash_bytes.div_ceil(t),
            weight_stash_bytes: self.weight_stash_bytes.div_ceil(t),
            params: self.params.div_ceil(t),
            tied_params: self.tied_params.div_ceil(t),
            ..self.clone()
        }
    }
}

/// A decoder-style transformer's shape.
///
/// [`Transformer::new`] gives the original architecture of the published
/// formulas (feed-forward width `4 h`, plain two-matrix FFN, as many key and
/// value heads as query heads, attention scores stored, tied output weights,
/// 2-byte activations); the other fields describe today's variants.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Transformer {
    /// `l`: transformer layers.
    pub layers: u64,
    /// `h`: hidden size.
    pub hidden: u64,
    /// `a`: attention (query) heads.
    pub heads: u64,
    /// `s`: sequence length.
    pub seq_len: u64,
    /// `V`: vocabulary size.
    pub vocab: u64,
    /// `f`: the feed-forward block's inner width (`4 h` in the original).
    pub ffn_hidden: u64,
    /// Whether the feed-forward block is gated (three `h x f` matrices, as
    /// in the GLU variants; Shazeer, "GLU Variants Improve Transformer",
    /// 2020) instead of two.
    pub gated_ffn: bool,
    /// `k`: key and value heads (grouped-query attention; Ainslie et al.,
    /// "GQA", EMNLP 2023); `heads` in the original. Divides `heads`.
    pub kv_heads: u64,
    /// How attention is computed.
    pub attention: Attention,
    /// Whether the output layer shares the token embedding's matrix.
    pub tied_embeddings: bool,
    /// Bytes per activation value (2 in the published formulas).
    pub bytes_per_value: u64,
}

/// How a transformer computes attention.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub enum Attention {
    /// The `s x s` score matrices (and their softmax and dropout mask) are
    /// stored for the backward pass.
    #[default]
    Standard,
    /// The score matrices are not stored but recomputed, block by block, in
    /// the backward pass (Dao et al., "FlashAttention", NeurIPS 2022).
    Flash,
}

impl Attention {
    /// The name used in scenario files.
    pub fn name(self) -> &'static str {
        match self {
            Attention::Standard => "standard",
            Attention::Flash => "flash",
        }
    }
}

/// An accelerator's arithmetic speed.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Speed {
    /// Peak FLOP per second.
    pub peak_flop_per_s: f64,
    /// Fraction of the peak reached in practice, in (0, 1].
    pub efficiency: f64,
}

impl Speed {
    /// Nanoseconds to do `flops` at this speed, rounded to the nearest ns.
    pub fn time_ns(&self, flops: f64) -> u64 {
        (flops * 1e9 / (self.peak_flop_per_s * self.efficiency)).round() as u64
    }
}

impl Transformer {
    /// The original architecture with these dimensions.
    pub const fn new(layers: u64, hidden: u64, heads: u64, seq_len: u64, vocab: u64) -> Transformer {
        Transformer {
            layers,
            hidden,
            heads,
            seq_len,
            vocab,
            ffn_hidden: 4 * hidden,
            gated_ffn: false,
            kv_heads: heads,
            attention: Attention::Standard,
            tied_embeddings: true,
            bytes_per_value: 2,
        }
    }

    /// Width of the key projection (and of the value projection):
    /// `k h / a`, the key and value heads times the head size.
    pub fn kv_width(&self) -> u64 {
        self.kv_heads * self.hidden / self.heads
    }

    /// Projection matrices of the feed-forward block: 3 when gated, else 2.
    pub fn ffn_matrices(&self) -> u64 {
        if self.gated_ffn {
            3
        } else {
            2
        }
    }

    /// Forward FLOPs of one transformer layer for `b` sequences.
    ///
    /// The original is `24 b s h^2 + 4 b s^2 h` (Narayanan et al. 2021,
    /// appendix). Term by term (2 FLOPs per multiply-add): the query and
    /// output projections `2 x 2 b s h^2`, the key and value projections
    /// `2 x 2 b s h w` with `w = k h / a`, the scores and the weighted sum of
    /// the values `2 x 2 b s^2 h` (every query head still scores every
    /// position), and the feed-forward block `2 b s h f` per matrix. So
    /// `4 b s h^2 + 4 b s h w + 2 n b s h f + 4 b s^2 h` with `n` matrices;
    /// with `w = h`, `f = 4 h`, `n = 2` this is the original.
    pub fn layer_forward_flops(&self, b: u64) -> f64 {
        let (s, h, b) = (self.seq_len as f64, self.hidden as f64, b as f64);
        let (w, f, n) = (self.kv_width() as f64, self.ffn_hidden as f64, self.ffn_matrices() as f64);
        4.0 * b * s * h * h + 4.0 * b * s * h * w + 2.0 * n * b * s * h * f + 4.0 * b * s * s * h
    }

    /// Backward FLOPs of one transformer layer: twice the forward's, plus,
    /// with flash attention, the scores computed again (`2 b s^2 h`: the
    /// score matrices are recomputed from the queries and keys instead of
    /// read back; Dao et al. 2022, sec. 3.1, "Recomputation").
    pub fn layer_backward_flops(&self, b: u64) -> f64 {
        let again = match self.attention {
            Attention::Standard => 0.0,
            Attention::Flash => 2.0 * b as f64 * (self.seq_len as f64).powi(2) * self.hidden as f64,
        };
        2.0 * self.layer_forward_flops(b) + again
    }

    /// Forward FLOPs of the logit layer: `2 b s h V`.
    pub fn logit_forward_flops(&self, b: u64) -> f64 {
        2.0 * b as f64 * self.seq_len as f64 * self.hidden as f64 * self.vocab as f64
    }

    /// Parameters of one transformer layer.
    ///
    /// The original `12 h^2 + 13 h` is, with a bias on every projection:
    /// query, key, value and output projections `4 h^2 + 4 h`, the
    /// feed-forward block `2 x 4 h^2 + 4 h + h`, two layer norms `4 h`.
    /// In general: query and output `2 h^2 + 2 h`, key and value
    /// `2 h w + 2 w`, the feed-forward block `n h f` plus a bias of `f` per
    /// input-side matrix (`n - 1` of them) and `h` for the output one, and
    /// `4 h` of layer norms.
    pub fn layer_params(&self) -> u64 {
        let (h, w, f, n) = (self.hidden, self.kv_width(), self.ffn_hidden, self.ffn_matrices());
        2 * h * h + 2 * h + 2 * h * w + 2 * w + n * h * f + (n - 1) * f + h + 4 * h
    }

    /// Parameters of the token and position embeddings: `(V + s) h`.
    pub fn embedding_params(&self) -> u64 {
        (self.vocab + self.seq_len) * self.hidden
    }

    /// Parameters the output layer shares with the token embedding: `V h`
    /// when the embeddings are tied (the position embedding is not shared),
    /// else 0.
    pub fn tied_params(&self) -> u64 {
        if self.tied_embeddings {
            self.vocab * self.hidden
        } else {
            0
        }
    }

    /// The output layer's own parameters: 0 when tied, else `V h`.
    pub fn logit_params(&self) -> u64 {
        if self.tied_embeddings {
            0
        } else {
            self.vocab * self.hidden
        }
    }

    /// All parameters: eq. 2 of Narayanan et al. 2021,
    /// `12 l h^2 (1 + 13/(12h) + (V+s)/(12 l h))` for the original; an untied
    /// output layer adds `V h`.
    pub fn total_params(&self) -> u64 {
        self.layers * self.layer_params() + self.embedding_params() + self.logit_params()
    }

    /// Bytes sent between stages per micro-batch of `b` sequences:
    /// `s b h` values (`2 s b h` bytes at 2 bytes a value).
    pub fn boundary_bytes(&self, b: u64) -> u64 {
        self.bytes_per_value * self.seq_len * b * self.hidden
    }

    /// Bytes one transformer layer stashes for its backward pass, rounded
    /// down.
    ///
    /// Korthikanti et al., eq. 1, `s b h (34 + 5 a s / h)` at 2 bytes a
    /// value, is in units of `s b`: attention `11 h` (its input `2 h`, the
    /// queries and keys `4 h`, the values `2 h`, the output projection's
    /// input `2 h`, a dropout mask `h`) plus the scores `5 a s` (softmax
    /// output `2 a s`, its dropout mask `a s`, the dropout output `2 a s`);
    /// the MLP `19 h` (input `2 h`, `8 h` into the activation function,
    /// `8 h` into the second matrix, a dropout mask `h`); layer norms `4 h`.
    /// Here keys and values take `2 w` each instead of `2 h`, so attention
    /// is `7 h + 4 w`; a plain FFN keeps `3 h + 4 f` (`2 f` into the
    /// activation function and `2 f` into the second matrix); a gated one
    /// `3 h + 6 f` (the gate's and the up projection's outputs and their
    /// product); flash attention stores no score term. The whole is scaled
    /// by `bytes_per_value / 2`.
    pub fn layer_stash_bytes(&self, b: u64) -> u64 {
        let (s, b, h) = (self.seq_len as u128, b as u128, self.hidden as u128);
        let (w, f) = (self.kv_width() as u128, self.ffn_hidden as u128);
        let ffn = if self.gated_ffn { 6 * f } else { 4 * f };
        let per_position = 7 * h + 4 * w + 3 * h + ffn + 4 * h;
        let scores = match self.attention {
            Attention::Standard => 5 * self.heads as u128 * s * s * b,
            Attention::Flash => 0,
        };
        ((s * b * per_position + scores) * self.bytes_per_value as u128 / 2) as u64
    }

    /// Bytes one transformer layer keeps for its weight-gradient pass (W)
    /// from the end of its input-gradient pass (B), for `b` sequences: each
    /// weight product's input and its output's gradient, per position
    /// `6 h + 2 w + n f` values (`n` = [`Transformer::ffn_matrices`]): the
    /// query/key/value projection's input `h` and output gradient `h + 2 w`,
    /// the output projection's input `h` and output gradient `h`, the FFN's
    /// input `h` (shared by its `n - 1` input matrices), their output
    /// gradients `(n - 1) f`, the last matrix's input `f` and output gradient
    /// `h`. In the original (`w = h`, `f = 4 h`, `n = 2`) that is `16 h`
    /// values, `32 s b h` bytes at 2 bytes a value, against eq. 1's
    /// `s b h (34 + 5 a s / h)` for the whole stash. Derived from the layer's
    /// matrix shapes (the products whose weights W differentiates); the
    /// score products and element-wise operations need nothing in W.
    pub fn layer_weight_stash_bytes(&self, b: u64) -> u64 {
        let (s, b, h) = (self.seq_len as u128, b as u128, self.hidden as u128);
        let (w, f, n) = (self.kv_width() as u128, self.ffn_hidden as u128, self.ffn_matrices() as u128);
        (s * b * (6 * h + 2 * w + n * f) * self.bytes_per_value as u128).min(u64::MAX as u128) as u64
    }

    /// FLOPs of one transformer layer's weight-gradient pass (W) for `b`
    /// sequences: each weight product's gradient costs what the product
    /// does, `4 b s h^2 + 4 b s h w + 2 n b s h f` (`24 b s h^2` in the
    /// original); the score products carry no weights, so their gradients
    /// belong to the input-gradient pass (B), which does the rest of the
    /// backward (`24 b s h^2 + 8 b s^2 h` in the original; Qi et al., "Zero
    /// Bubble Pipeline Parallelism", ICLR 2024, sec. 2).
    pub fn weight_gradient_flops(&self, b: u64) -> f64 {
        let (s, h, b) = (self.seq_len as f64, self.hidden as f64, b as f64);
        let (w, f, n) = (self.kv_width() as f64, self.ffn_hidden as f64, self.ffn_matrices() as f64);
        4.0 * b * s * h * h + 4.0 * b * s * h * w + 2.0 * n * b * s * h * f
    }

    /// Forward FLOPs of a transformer layer's attention part (the query,
    /// key, value and output projections and the score products), for `b`
    /// sequences: `4 b s h^2 + 4 b s h w + 4 b s^2 h` (`8 b s h^2 + 4 b s^2 h`
    /// in the original); the rest of [`Transformer::layer_forward_flops`] is
    /// the MLP (`16 b s h^2` in the original).
    pub fn attention_forward_flops(&self, b: u64) -> f64 {
        let (s, h, b) = (self.seq_len as f64, self.hidden as f64, b as f64);
        let w = self.kv_width() as f64;
        4.0 * b * s * h * h + 4.0 * b * s * h * w + 4.0 * b * s * s * h
    }

    /// Bytes one device of a tensor-parallel group of `t` stashes for one
    /// transformer layer, rounded down.
    ///
    /// Korthikanti et al., "Reducing Activation Recomputation in Large
    /// Transformer Models", MLSys 2023: eq. 2, `s b h (10 + 24/t + 5 a s /
    /// (h t))` without sequence parallelism, eq. 3, `s b h (34 + 5 a s / h) /
    /// t` with it. In the terms of [`Transformer::layer_stash_bytes`], the
    /// `10 h` left whole without sequence parallelism are the layer norms'
    /// inputs (`4 h`), the attention's and the MLP's inputs (`2 h` each) and
    /// the two dropout masks (`h` each); the queries, keys, values, the
    /// output projection's input (`4 h + 4 w`), the FFN's inner values and
    /// the scores are split over the `t` devices.
    pub fn layer_stash_bytes_tensor(&self, b: u64, t: u64, sequence: bool) -> u64 {
        let t = t.max(1) as u128;
        let (s, b, h) = (self.seq_len as u128, b as u128, self.hidden as u128);
        let (w, f) = (self.kv_width() as u128, self.ffn_hidden as u128);
        let ffn = if self.gated_ffn { 6 * f } else { 4 * f };
        let whole = 10 * h;
        let split = 4 * h + 4 * w + ffn;
        let scores = match self.attention {
            Attention::Standard => 5 * self.heads as u128 * s * s * b,
            Attention::Flash => 0,
        };
        let in_t_parts = if sequence { s * b * (whole + split) + scores } else { s * b * (whole * t + split) + scores };
        (in_t_parts * self.bytes_per_value as u128 / (2 * t)) as u64
    }

    /// The layer table for one device of a tensor-parallel group of `t`
    /// (with sequence parallelism or not): the times of
    /// [`Transformer::layer_table`] divided by `t` (rounded up), parameters
    /// divided by `t` (the embedding and logit matrices split by vocabulary),
    /// transformer layers stashing [`Transformer::layer_stash_bytes_tensor`],
    /// the logit layer its input (split only with sequence parallelism) and
    /// its `1/t` of the logits. Each transformer layer does two all-reduces
    /// of `s b h` values per pass (Shoeybi et al., "Megatron-LM", 2019, sec.
    /// 3); the embedding and logit layers none (their small reductions are
    /// left out). With `t = 1` this is [`Transformer::layer_table`].
    pub fn layer_table_tensor(&self, b: u64, speed: Speed, t: u64, sequence: bool) -> Vec<LayerCost> {
        let mut out = self.layer_table(b, speed);
        if t <= 1 {
            return out;
        }
        let boundary = self.boundary_bytes(b);
        let logits_bytes = self.bytes_per_value * self.seq_len * b * self.vocab;
        let stash = self.layer_stash_bytes_tensor(b, t, sequence);
        for l in out.iter_mut() {
            let whole_stash = if l.name == "logits" {
                Some(if sequence { (boundary + logits_bytes).div_ceil(t) } else { boundary + logits_bytes.div_ceil(t) })
            } else if l.name.starts_with("layer.") {
                Some(stash)
            } else {
                None
            };
            let mut r = l.per_tensor_rank(t);
            if let Some(st) = whole_stash {
                r.stash_bytes = st;
                if l.name == "logits" {
                    r.weight_stash_bytes = st;
                }
            }
            *l = r;
        }
        out
    }

    /// The layer table: an embedding layer, `l` transformer layers and the
    /// logit layer, for micro-batches of `b` sequences.
    ///
    /// The embedding lookup does no arithmetic (no FLOPs are counted for it, as
    /// in eq. 3 of Narayanan et al.) and stashes nothing but token ids, taken
    /// as 0 bytes. With tied embeddings the logit layer's parameters are the
    /// token embedding's (counted once, as in eq. 2: its `params` is 0 and its
    /// `tied_params` is `V h`, copied when it runs on another device);
    /// untied, it has `V h` of its own. It stashes its input and logits,
    /// `s b h + s b V` values (common practice, no source).
    pub fn layer_table(&self, b: u64, speed: Speed) -> Vec<LayerCost> {
        let boundary = self.boundary_bytes(b);
        let f = self.layer_forward_flops(b);
        let back = self.layer_backward_flops(b);
        let logit = self.logit_forward_flops(b);
        let logits_bytes = self.bytes_per_value * self.seq_len * b * self.vocab;
        let mut out = Vec::with_capacity(self.layers as usize + 2);
        // Attention's share of the forward; the backward runs the MLP first.
        let attention = self.attention_forward_flops(b);
        let mlp_back = 2.0 * (f - attention);
        out.push(LayerCost {
            stash_bytes: 0,
            weight_stash_bytes: 0,
            params: self.embedding_params(),
            ..LayerCost::new("embedding", 0, 0, boundary)
        });
        for i in 0..self.layers {
            out.push(LayerCost {
                name: format!("layer.{i}"),
                forward_ns: speed.time_ns(f),
                backward_ns: speed.time_ns(back),
                activation_bytes: boundary,
                stash_bytes: self.layer_stash_bytes(b),
                params: self.layer_params(),
                tied_params: 0,
                tensor_bytes: boundary,
                forward_split: (attention.round() as u64, f.round() as u64),
                backward_split: (mlp_back.round() as u64, back.round() as u64),
                weight_ns: speed.time_ns(self.weight_gradient_flops(b)).min(speed.time_ns(back)),
                weight_stash_bytes: self.layer_weight_stash_bytes(b),
            });
        }
        out.push(LayerCost {
            stash_bytes: boundary + logits_bytes,
            weight_stash_bytes: boundary + logits_bytes,
            params: self.logit_params(),
            tied_params: self.tied_params(),
            ..LayerCost::new("logits", speed.time_ns(logit), speed.time_ns(2.0 * logit), logits_bytes)
        });
        out
    }
}

/// Bytes of model state for `params` parameters at `bytes_per_param`
/// (16 for mixed-precision Adam: 2 + 2 + 12; Rajbhandari et al., "ZeRO",
/// SC 2020, sec. 3.1).
pub fn state_bytes(params: u64, bytes_per_param: u64) -> u64 {
    params.saturating_mul(bytes_per_param)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The 145.6-billion-parameter configuration of table 1 in Narayanan et al.
    /// 2021: l = 80, h = 12288, a = 96, s = 2048, V = 51200.
    const GPT_145B: Transformer = Transformer::new(80, 12288, 96, 2048, 51200);

    #[test]
    fn parameters_match_table_1() {
        // Narayanan et al., SC 2021, eq. 2 and table 1: 145.6 billion.
        let p = GPT_145B.total_params();
        assert_eq!((p as f64 / 1e8).round() / 10.0, 145.6, "{p}");
        // Eq. 2 in its published form agrees with the per-layer sum.
        let (l, h, v, s) = (80.0f64, 12288.0f64, 51200.0f64, 2048.0f64);
        let eq2 = 12.0 * l * h * h * (1.0 + 13.0 / (12.0 * h) + (v + s) / (12.0 * l * h));
        assert!((p as f64 - eq2).abs() / eq2 < 1e-12);
        // Same table, l = 128, h = 25600, a = 160: 1008.0 billion.
        let t = Transformer::new(128, 25600, 160, 2048, 51200);
        assert_eq!((t.total_params() as f64 / 1e8).round() / 10.0, 1008.0);
    }

    #[test]
    fn stash_matches_korthikanti_eq_1() {
        // Korthikanti et al., MLSys 2023, eq. 1: s b h (34 + 5 a s / h); for
        // s = 2048, b = 1, h = 12288, a = 96: 5 a s / h = 80, so 114 s b h.
        assert_eq!(GPT_145B.layer_stash_bytes(1), 2_868_903_936);
        assert_eq!(GPT_145B.layer_stash_bytes(1), 114 * 2048 * 12288);
        assert_eq!(GPT_145B.layer_stash_bytes(4), 4 * 2_868_903_936);
    }

    #[test]
    fn state_memory_matches_zero() {
        // Rajbhandari et al., ZeRO, SC 2020, sec. 3.1: 1.5e9 parameters x 16 B = 24 GB.
        assert_eq!(state_bytes(1_500_000_000, 16), 24_000_000_000);
    }

    #[test]
    fn flops_and_times() {
        // Narayanan et al. 2021, appendix: 24 b s h^2 + 4 b s^2 h per layer.
        let t = Transformer::new(2, 1024, 16, 512, 1000);
        assert_eq!(t.layer_forward_flops(2), 24.0 * 2.0 * 512.0 * 1024.0 * 1024.0 + 4.0 * 2.0 * 512.0 * 512.0 * 1024.0);
        assert_eq!(t.logit_forward_flops(1), 2.0 * 512.0 * 1024.0 * 1000.0);
        // 1e12 FLOPs at 400 TFLOP/s x 0.5 = 5 ms.
        let speed = Speed { peak_flop_per_s: 400e12, efficiency: 0.5 };
        assert_eq!(speed.time_ns(1e12), 5_000_000);
        let table = t.layer_table(2, speed);
        assert_eq!(table.len(), 4);
        // b = 2, s = 512, h = 1024 at 400e12 x 0.5 = 2e14 FLOP/s:
        // forward 24 x 2 x 512 x 1024^2 + 4 x 2 x 512^2 x 1024
        //   = 25,769,803,776 + 2,147,483,648 = 27,917,287,424 FLOPs
        //   -> 139,586.437 ns, rounded 139,586; backward twice: 279,172.874 -> 279,173.
        assert_eq!((table[1].forward_ns, table[1].backward_ns), (139_586, 279_173));
        // Logit layer 2 b s h V = 2 x 2 x 512 x 1024 x 1000 = 2,097,152,000 FLOPs -> 10,485.76 ns.
        assert_eq!((table[3].forward_ns, table[3].backward_ns), (10_486, 20_972));
        assert_eq!(table[1].activation_bytes, 2 * 512 * 2 * 1024);
        // Parameters: 12 h^2 + 13 h = 12,582,912 + 13,312 = 12,596,224 per layer;
        // embeddings (V + s) h = 1,512 x 1024 = 1,548,288; in all
        // 2 x 12,596,224 + 1,548,288 = 26,740,736. The logit layer's own
        // parameters are 0; it shares V h = 1,024,000 with the embedding.
        let params: Vec<u64> = table.iter().map(|l| l.params).collect();
        assert_eq!(params, vec![1_548_288, 12_596_224, 12_596_224, 0]);
        assert_eq!(params.iter().sum::<u64>(), 26_740_736);
        assert_eq!(t.total_params(), 26_740_736);
        assert_eq!(table[3].tied_params, 1_024_000);
        assert!(table[..3].iter().all(|l| l.tied_params == 0));
        // Kaplan et al., "Scaling Laws for Neural Language Models", 2020, sec. 2.1:
        // training costs about 6 N FLOPs per token. Without the attention term
        // (4 b s^2 h), forward + backward of a layer per token is
        // 3 x 24 h^2 = 6 x (12 h^2), six times its weight count.
        let no_attention = t.layer_forward_flops(1) - 4.0 * 512.0 * 512.0 * 1024.0;
        assert_eq!(3.0 * no_attention / 512.0, 6.0 * (12 * 1024 * 1024) as f64);
    }

    /// A small shape for hand-worked cases: l = 1, h = 1024, a = 16,
    /// s = 512, V = 1000, one sequence per micro-batch.
    const SMALL: Transformer = Transformer::new(1, 1024, 16, 512, 1000);

    #[test]
    fn grouped_query_attention_shrinks_keys_and_values() {
        // Ainslie et al., "GQA", EMNLP 2023: k key/value heads of size h / a,
        // so the K and V projections are h x (k h / a). k = 4: w = 4 x 1024 / 16 = 256.
        let t = Transformer { kv_heads: 4, ..SMALL };
        assert_eq!(t.kv_width(), 256);
        // Parameters: the original 12 h^2 + 13 h = 12,582,912 + 13,312 = 12,596,224;
        // K and V go from 2 h^2 + 2 h = 2,099,200 to 2 h w + 2 w = 524,288 + 512
        // = 524,800, 1,574,400 fewer: 11,021,824.
        assert_eq!(SMALL.layer_params(), 12_596_224);
        assert_eq!(t.layer_params(), 11_021_824);
        // Forward FLOPs: the original 24 b s h^2 + 4 b s^2 h = 12,884,901,888 +
        // 1,073,741,824 = 13,958,643,712; the K and V projections go from
        // 4 b s h^2 = 2,147,483,648 to 4 b s h w = 536,870,912: 12,348,030,976.
        assert_eq!(SMALL.layer_forward_flops(1), 13_958_643_712.0);
        assert_eq!(t.layer_forward_flops(1), 12_348_030_976.0);
        // Stash: Korthikanti et al. eq. 1, s b h (34 + 5 a s / h) = 524,288 x
        // (34 + 40) = 38,797,312; K and V stored at 2 w instead of 2 h bytes per
        // position each: 4 (h - w) s b = 4 x 768 x 512 = 1,572,864 less: 37,224,448.
        assert_eq!(SMALL.layer_stash_bytes(1), 38_797_312);
        assert_eq!(t.layer_stash_bytes(1), 37_224_448);
    }

    #[test]
    fn gated_ffn_has_three_matrices() {
        // Shazeer, "GLU Variants Improve Transformer", 2020: a gate, an up
        // and a down projection, each h x f. f = 2048.
        let t = Transformer { gated_ffn: true, ffn_hidden: 2048, ..SMALL };
        // Parameters: attention 4 h^2 + 4 h = 4,194,304 + 4,096, layer norms
        // 4 h = 4,096; FFN 3 h f = 6,291,456 plus biases 2 f + h = 5,120:
        // 4,202,496 + 6,296,576 = 10,499,072.
        assert_eq!(t.layer_params(), 10_499_072);
        // Forward FLOPs: FFN 6 b s h f = 6 x 512 x 1024 x 2048 = 6,442,450,944;
        // attention 8 b s h^2 + 4 b s^2 h = 4,294,967,296 + 1,073,741,824:
        // 11,811,160,064.
        assert_eq!(t.layer_forward_flops(1), 11_811_160_064.0);
        // Stash: s b (14 h + 4 h + 6 f) + 5 a s^2 b = 512 x (14,336 + 4,096 +
        // 12,288) + 5 x 16 x 262,144 = 15,728,640 + 20,971,520 = 36,700,160.
        assert_eq!(t.layer_stash_bytes(1), 36_700_160);
        // A plain FFN of another width, f = 3000: 2 h f + f + h = 6,144,000 +
        // 4,024 = 6,148,024, plus 4,202,496: 10,350,520; FLOPs 4 b s h f =
        // 6,291,456,000 + 5,368,709,120 = 11,660,165,120.
        let wide = Transformer { ffn_hidden: 3000, ..SMALL };
        assert_eq!(wide.layer_params(), 10_350_520);
        assert_eq!(wide.layer_forward_flops(1), 11_660_165_120.0);
    }

    #[test]
    fn flash_attention_stores_no_scores() {
        // Dao et al., "FlashAttention", NeurIPS 2022: the s x s matrices are
        // recomputed in the backward pass, not stored. The 5 a s / h term
        // goes: 34 s b h = 34 x 524,288 = 17,825,792 bytes.
        let t = Transformer { attention: Attention::Flash, ..SMALL };
        assert_eq!(t.layer_stash_bytes(1), 17_825_792);
        // Forward unchanged; backward 2 x 13,958,643,712 plus the scores again,
        // 2 b s^2 h = 536,870,912: 28,454,158,336.
        assert_eq!(t.layer_forward_flops(1), SMALL.layer_forward_flops(1));
        assert_eq!(t.layer_backward_flops(1), 28_454_158_336.0);
        assert_eq!(SMALL.layer_backward_flops(1), 27_917_287_424.0);
    }

    #[test]
    fn untied_output_layer_has_its_own_weights() {
        // V h = 1000 x 1024 = 1,024,000 parameters of its own, none shared.
        let t = Transformer { tied_embeddings: false, ..SMALL };
        let speed = Speed { peak_flop_per_s: 1e15, efficiency: 1.0 };
        let table = t.layer_table(1, speed);
        let logits = table.last().unwrap();
        assert_eq!((logits.params, logits.tied_params), (1_024_000, 0));
        // Total: 12,596,224 + (1000 + 512) x 1024 = 1,548,288, + 1,024,000.
        assert_eq!(t.total_params(), 12_596_224 + 1_548_288 + 1_024_000);
        let tied = SMALL.layer_table(1, speed);
        assert_eq!((tied.last().unwrap().params, tied.last().unwrap().tied_params), (0, 1_024_000));
    }

    #[test]
    fn bytes_per_value_scales_activations() {
        // The published formulas count 2-byte values; at 4 bytes every
        // activation doubles: stash 2 x 38,797,312 = 77,594,624, boundary
        // 4 s b h = 4 x 512 x 1024 = 2,097,152, logits 4 s b V = 2,048,000.
        let t = Transformer { bytes_per_value: 4, ..SMALL };
        assert_eq!(t.layer_stash_bytes(1), 77_594_624);
        assert_eq!(t.boundary_bytes(1), 2_097_152);
        let table = t.layer_table(1, Speed { peak_flop_per_s: 1e15, efficiency: 1.0 });
        assert_eq!(table.last().unwrap().activation_bytes, 2_048_000);
        assert_eq!(table.last().unwrap().stash_bytes, 2_097_152 + 2_048_000);
        // At 1 byte, half (rounded down): 19,398,656.
        assert_eq!(Transformer { bytes_per_value: 1, ..SMALL }.layer_stash_bytes(1), 19_398_656);
    }
}
