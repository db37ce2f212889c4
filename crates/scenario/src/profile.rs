//! Per-layer profiles as CSV: the table a user exports from their profiler.
//!
//! Header `name,forward_ms,backward_ms,activation_bytes,stash_bytes,params,tied_params`
//! and optionally `tensor_bytes` (each of the layer's two tensor-parallel
//! all-reduces per pass); `backward_ms` (default 2 x forward, common
//! practice, no source), `stash_bytes` (default `activation_bytes`),
//! `params`, `tied_params` and `tensor_bytes` (default 0) may be left out of
//! the header or left empty in a row. Times are decimal
//! milliseconds, read exactly (to the nanosecond); sizes are whole bytes;
//! parameter counts are whole numbers or carry a `k`, `M`, `B` or `T` suffix.

use std::io::Write;

use crate::{units, LayerCost, ScenarioError};

/// Columns a profile may have, in the order they are written.
pub const COLUMNS: [&str; 9] = [
    "name",
    "forward_ms",
    "backward_ms",
    "activation_bytes",
    "stash_bytes",
    "params",
    "tied_params",
    "tensor_bytes",
    "weight_ms",
];
const REQUIRED: [&str; 3] = ["name", "forward_ms", "activation_bytes"];

/// Reads a profile; `file` labels errors, which name the line and column.
pub fn read(text: &str, file: &str) -> Result<Vec<LayerCost>, ScenarioError> {
    let err = |line: u64, column: &str, message: String| ScenarioError::Profile {
        file: file.to_string(),
        line,
        column: column.to_string(),
        message,
    };
    let mut rdr = csv::ReaderBuilder::new().trim(csv::Trim::All).from_reader(text.as_bytes());
    let headers = rdr.headers().map_err(|e| err(1, "header", e.to_string()))?.clone();
    let mut index = [None; COLUMNS.len()];
    for (i, h) in headers.iter().enumerate() {
        let Some(c) = COLUMNS.iter().position(|c| *c == h) else {
            return Err(err(1, h, format!("unknown column `{h}`; expected: {}", COLUMNS.join(", "))));
        };
        if index[c].replace(i).is_some() {
            return Err(err(1, h, format!("column `{h}` appears twice")));
        }
    }
    if let Some(missing) = REQUIRED.iter().find(|c| index[COLUMNS.iter().position(|x| x == *c).unwrap_or(0)].is_none())
    {
        return Err(err(1, missing, format!("missing required column `{missing}`")));
    }
    let mut layers = Vec::new();
    for record in rdr.records() {
        let record = record.map_err(|e| {
            let line = e.position().map_or(0, |p| p.line());
            err(line, "row", e.to_string())
        })?;
        let line = record.position().map_or(0, |p| p.line());
        let cell = |c: usize| index[c].and_then(|i| record.get(i)).filter(|s| !s.is_empty());
        let name = cell(0).map(str::to_string).unwrap_or_else(|| format!("layer{}", layers.len()));
        let ms = |c: usize| -> Result<Option<u64>, ScenarioError> {
            cell(c).map(|v| units::parse_duration_in(v, "ms").map_err(|m| err(line, COLUMNS[c], m))).transpose()
        };
        let whole = |c: usize| -> Result<Option<u64>, ScenarioError> {
            cell(c)
                .map(|v| {
                    v.parse::<u64>().map_err(|_| err(line, COLUMNS[c], format!("`{v}` is not a whole number of bytes")))
                })
                .transpose()
        };
        let forward_ns = ms(1)?.ok_or_else(|| err(line, "forward_ms", "is empty".into()))?;
        let backward_ns = ms(2)?.unwrap_or(forward_ns.saturating_mul(2));
        for (c, v) in [(1, forward_ns), (2, backward_ns)] {
            if v > crate::MAX_DURATION_NS {
                let most = crate::MAX_DURATION_NS / 1_000_000;
                return Err(err(line, COLUMNS[c], format!("is too large: a duration may be at most {most} ms")));
            }
        }
        let activation_bytes = whole(3)?.ok_or_else(|| err(line, "activation_bytes", "is empty".into()))?;
        let stash_bytes = whole(4)?.unwrap_or(activation_bytes);
        let count = |c: usize| -> Result<u64, ScenarioError> {
            Ok(cell(c).map(|v| units::parse_count(v).map_err(|m| err(line, COLUMNS[c], m))).transpose()?.unwrap_or(0))
        };
        let params = count(5)?;
        let tied_params = count(6)?;
        let tensor_bytes = whole(7)?.unwrap_or(0);
        let weight_ns = ms(8)?.unwrap_or(backward_ns / 2);
        if weight_ns > backward_ns {
            return Err(err(line, "weight_ms", "is part of backward_ms, so at most backward_ms".into()));
        }
        if layers.len() as u64 >= crate::MAX_LAYERS {
            return Err(err(line, "row", format!("more than {} layers", crate::MAX_LAYERS)));
        }
        layers.push(LayerCost {
            stash_bytes,
            weight_stash_bytes: stash_bytes,
            params,
            tied_params,
            tensor_bytes,
            weight_ns,
            ..LayerCost::new(name, forward_ns, backward_ns, activation_bytes)
        });
    }
    if layers.is_empty() {
        return Err(err(1, "row", "the profile has no layers".into()));
    }
    Ok(layers)
}

/// Formats nanoseconds as exact decimal milliseconds (`1.2`, `0.000001`).
pub fn ms_text(ns: u64) -> String {
    let (whole, frac) = (ns / 1_000_000, ns % 1_000_000);
    if frac == 0 {
        whole.to_string()
    } else {
        let f = format!("{frac:06}");
        format!("{whole}.{}", f.trim_end_matches('0'))
    }
}

/// Writes `layers` as a profile that [`read`] gives back exactly (the
/// `tensor_bytes` column only when a layer has tensor-parallel traffic; a
/// transformer layer's split of its time around its all-reduces is not kept:
/// read back, a layer splits its time in halves).
pub fn write<W: Write>(layers: &[LayerCost], out: W) -> Result<(), csv::Error> {
    let mut w = csv::Writer::from_writer(out);
    // Optional columns only when they carry something: tensor-parallel
    // traffic, or a weight-gradient time other than the default half.
    let weight = layers.iter().any(|l| l.weight_ns != l.backward_ns / 2);
    let tensor = weight || layers.iter().any(|l| l.tensor_bytes > 0);
    let n = if weight {
        9
    } else if tensor {
        8
    } else {
        7
    };
    w.write_record(&COLUMNS[..n])?;
    for l in layers {
        let mut row = vec![
            l.name.clone(),
            ms_text(l.forward_ns),
            ms_text(l.backward_ns),
            l.activation_bytes.to_string(),
            l.stash_bytes.to_string(),
            l.params.to_string(),
            l.tied_params.to_string(),
        ];
        if tensor {
            row.push(l.tensor_bytes.to_string());
        }
        if weight {
            row.push(ms_text(l.weight_ns));
        }
        w.write_record(row)?;
    }
    w.flush()?;
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn reads_full_and_partial_tables() {
        let t = "name,forward_ms,backward_ms,activation_bytes,stash_bytes,params\nembed,0.5,1,1024,0,350M\nblock,1.25,,2048,,1.2B\n";
        let l = read(t, "p.csv").unwrap();
        assert_eq!(l[0].forward_ns, 500_000);
        assert_eq!(l[0].params, 350_000_000);
        assert_eq!(l[1].backward_ns, 2_500_000, "backward defaults to 2 x forward");
        assert_eq!(l[1].stash_bytes, 2048, "stash defaults to activation");
        assert_eq!(l[1].params, 1_200_000_000);
        let short = read("name,forward_ms,activation_bytes\nx,2,10\n", "p.csv").unwrap();
        assert_eq!((short[0].backward_ns, short[0].params, short[0].tied_params), (4_000_000, 0, 0));
        let tied = read("name,forward_ms,activation_bytes,tied_params\nlogits,1,10,52.4M\n", "p.csv").unwrap();
        assert_eq!(tied[0].tied_params, 52_400_000);
    }

    #[test]
    fn bad_rows_name_line_and_column() {
        let e = read("name,forward_ms,activation_bytes\na,1,10\nb,fast,10\n", "p.csv").unwrap_err();
        assert_eq!(e.to_string().split(": ").take(2).collect::<Vec<_>>(), vec!["p.csv:3", "column forward_ms"]);
        let e = read("name,forward_ms,activation_bytes\na,NaN,3\n", "p.csv").unwrap_err();
        assert_eq!(e.to_string(), "p.csv:2: column forward_ms: `NaN` is not a number");
        let e = read("name,forward_ms,activation_bytes\na,2ms,3\n", "p.csv").unwrap_err();
        assert!(e.to_string().contains("`2ms` is not a plain number of ms"), "{e}");
        let e = read("name,forward_ms,activation_bytes\na,1,-3\n", "p.csv").unwrap_err();
        assert!(e.to_string().starts_with("p.csv:2: column activation_bytes"), "{e}");
        let e = read("name,forward_ms,activation_bytes,colour\n", "p.csv").unwrap_err();
        assert!(e.to_string().contains("unknown column `colour`"), "{e}");
        let e = read("name,backward_ms,activation_bytes\n", "p.csv").unwrap_err();
        assert!(e.to_string().contains("missing required column `forward_ms`"), "{e}");
        let e = read("name,forward_ms,activation_bytes\na,1,10,extra\n", "p.csv").unwrap_err();
        assert!(e.to_string().starts_with("p.csv:2"), "{e}");
        assert!(read("name,forward_ms,activation_bytes\n", "p.csv").is_err(), "no layers");
        assert!(read("name,forward_ms,activation_bytes\na,0.0000001,1\n", "p.csv").is_err(), "below a nanosecond");
    }

    #[test]
    fn writes_what_it_reads() {
        let layers = vec![LayerCost {
            weight_ns: 0,
            weight_stash_bytes: 7,
            tensor_bytes: 0,
            forward_split: (1, 2),
            backward_split: (1, 2),
            name: "a, \"quoted\"".into(),
            forward_ns: 1_234_567,
            backward_ns: 1,
            activation_bytes: 5,
            stash_bytes: 7,
            params: 9,
            tied_params: 11,
        }];
        let mut out = Vec::new();
        write(&layers, &mut out).unwrap();
        assert_eq!(read(std::str::from_utf8(&out).unwrap(), "x.csv").unwrap(), layers);
        assert_eq!(ms_text(1_200_000), "1.2");
        assert_eq!(ms_text(3_000_000), "3");
        assert_eq!(ms_text(1), "0.000001");
    }
}
