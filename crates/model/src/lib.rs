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
}

/// A decoder-style transformer's shape.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Transformer {
    /// `l`: transformer layers.
    pub layers: u64,
    /// `h`: hidden size.
    pub hidden: u64,
    /// `a`: attention heads.
    pub heads: u64,
    /// `s`: sequence length.
    pub seq_len: u64,
    /// `V`: vocabulary size.
    pub vocab: u64,
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
    /// Forward FLOPs of one transformer layer for `b` sequences:
    /// `24 b s h^2 + 4 b s^2 h` (Narayanan et al. 2021, appendix).
    pub fn layer_forward_flops(&self, b: u64) -> f64 {
        let (s, h, b) = (self.seq_len as f64, self.hidden as f64, b as f64);
        24.0 * b * s * h * h + 4.0 * b * s * s * h
    }

    /// Forward FLOPs of the logit layer: `2 b s h V`.
    pub fn logit_forward_flops(&self, b: u64) -> f64 {
        2.0 * b as f64 * self.seq_len as f64 * self.hidden as f64 * self.vocab as f64
    }

    /// Parameters of one transformer layer: `12 h^2 + 13 h`.
    pub fn layer_params(&self) -> u64 {
        12 * self.hidden * self.hidden + 13 * self.hidden
    }

    /// Parameters of the token and position embeddings: `(V + s) h`.
    pub fn embedding_params(&self) -> u64 {
        (self.vocab + self.seq_len) * self.hidden
    }

    /// Parameters the output layer shares with the token embedding, `V h`
    /// (the position embedding is not shared).
    pub fn tied_params(&self) -> u64 {
        self.vocab * self.hidden
    }

    /// All parameters: eq. 2 of Narayanan et al. 2021,
    /// `12 l h^2 (1 + 13/(12h) + (V+s)/(12 l h))`.
    pub fn total_params(&self) -> u64 {
        self.layers * self.layer_params() + self.embedding_params()
    }

    /// Bytes sent between stages per micro-batch of `b` sequences: `2 s b h`.
    pub fn boundary_bytes(&self, b: u64) -> u64 {
        2 * self.seq_len * b * self.hidden
    }

    /// Bytes one transformer layer stashes for its backward pass:
    /// `s b h (34 + 5 a s / h)` (Korthikanti et al., eq. 1), rounded down.
    pub fn layer_stash_bytes(&self, b: u64) -> u64 {
        let sbh = (self.seq_len * b * self.hidden) as u128;
        // s b h (34 + 5 a s / h) = 34 s b h + 5 a s^2 b, exactly.
        (34 * sbh + 5 * self.heads as u128 * (self.seq_len as u128).pow(2) * b as u128) as u64
    }

    /// The layer table: an embedding layer, `l` transformer layers and the
    /// logit layer, for micro-batches of `b` sequences.
    ///
    /// The embedding lookup does no arithmetic (no FLOPs are counted for it, as
    /// in eq. 3 of Narayanan et al.) and stashes nothing but token ids, taken
    /// as 0 bytes. The logit layer's parameters are the token embedding's
    /// (counted once, as in eq. 2: its `params` is 0 and its `tied_params`
    /// is `V h`, copied when it runs on another device), and it stashes its 16-bit input and logits,
    /// `2 s b h + 2 s b V` bytes (common practice, no source).
    pub fn layer_table(&self, b: u64, speed: Speed) -> Vec<LayerCost> {
        let boundary = self.boundary_bytes(b);
        let f = self.layer_forward_flops(b);
        let logit = self.logit_forward_flops(b);
        let mut out = Vec::with_capacity(self.layers as usize + 2);
        out.push(LayerCost {
            name: "embedding".into(),
            forward_ns: 0,
            backward_ns: 0,
            activation_bytes: boundary,
            stash_bytes: 0,
            params: self.embedding_params(),
            tied_params: 0,
        });
        for i in 0..self.layers {
            out.push(LayerCost {
                name: format!("layer.{i}"),
                forward_ns: speed.time_ns(f),
                backward_ns: speed.time_ns(2.0 * f),
                activation_bytes: boundary,
                stash_bytes: self.layer_stash_bytes(b),
                params: self.layer_params(),
                tied_params: 0,
            });
        }
        out.push(LayerCost {
            name: "logits".into(),
            forward_ns: speed.time_ns(logit),
            backward_ns: speed.time_ns(2.0 * logit),
            activation_bytes: 2 * self.seq_len * b * self.vocab,
            stash_bytes: boundary + 2 * self.seq_len * b * self.vocab,
            params: 0,
            tied_params: self.tied_params(),
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
    const GPT_145B: Transformer = Transformer { layers: 80, hidden: 12288, heads: 96, seq_len: 2048, vocab: 51200 };

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
        let t = Transformer { layers: 128, hidden: 25600, heads: 160, seq_len: 2048, vocab: 51200 };
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
        let t = Transformer { layers: 2, hidden: 1024, heads: 16, seq_len: 512, vocab: 1000 };
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
}
