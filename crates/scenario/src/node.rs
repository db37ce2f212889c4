//! A YAML document as a tree that remembers where each value came from, so that
//! every error can name the key path and the line and column (or the `--set`
//! argument) of the offending value.

use std::fmt;

use serde::de::{self, Deserializer, MapAccess, SeqAccess, Visitor};
use serde::Deserialize;
use serde_saphyr::Spanned;

use crate::ScenarioError;

/// Where a value was written.
#[derive(Clone, Debug, PartialEq, Eq)]
pub enum Origin {
    /// Line and column (1-based) in the scenario file.
    File {
        /// Line, 1-based.
        line: u32,
        /// Column, 1-based.
        column: u32,
    },
    /// A command-line option, as typed (`--set KEY=VALUE`, `--vary
    /// KEY=VALUE`, `--stages 8`).
    Set(String),
    /// Not written anywhere (a default).
    Default,
}

impl fmt::Display for Origin {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Origin::File { line, column } => write!(f, "line {line}, column {column}"),
            Origin::Set(typed) => f.write_str(typed),
            Origin::Default => f.write_str("default"),
        }
    }
}

/// A value of the tree.
#[derive(Clone, Debug, PartialEq)]
pub enum Value {
    /// Keys (with where each was written) and their values, in order.
    Map(Vec<(String, Origin, Node)>),
    /// A list.
    Seq(Vec<Node>),
    /// Text.
    Str(String),
    /// A whole number.
    Int(i128),
    /// A decimal number.
    Float(f64),
    /// `true` or `false`.
    Bool(bool),
    /// `null` or nothing.
    Null,
}

/// A value with its origin.
#[derive(Clone, Debug, PartialEq)]
pub struct Node {
    /// The value.
    pub value: Value,
    /// Where it was written.
    pub origin: Origin,
    /// A number's text as written (`1e30`, not the number it parses to),
    /// for messages that echo it.
    pub written: Option<String>,
}

impl Node {
    /// How to show the value in a message: a number as written, text in
    /// backquotes, anything else by its kind.
    pub fn shown(&self) -> String {
        match (&self.value, &self.written) {
            (Value::Int(_) | Value::Float(_), Some(w)) => w.clone(),
            (Value::Int(i), None) => i.to_string(),
            (Value::Float(f), None) => f.to_string(),
            (Value::Str(s), _) => format!("`{s}`"),
            (other, _) => other.kind().to_string(),
        }
    }
}

impl Value {
    /// A short description for "expected X, found Y" messages.
    pub fn kind(&self) -> &'static str {
        match self {
            Value::Map(_) => "a mapping",
            Value::Seq(_) => "a list",
            Value::Str(_) => "text",
            Value::Int(_) => "an integer",
            Value::Float(_) => "a number",
            Value::Bool(_) => "true/false",
            Value::Null => "nothing",
        }
    }
}

/// The raw shape read by serde before origins are attached.
enum Raw {
    Map(Vec<(Spanned<String>, Spanned<Raw>)>),
    Seq(Vec<Spanned<Raw>>),
    Str(String),
    Int(i128),
    Float(f64),
    Bool(bool),
    Null,
}

impl<'de> Deserialize<'de> for Raw {
    fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        struct V;
        impl<'de> Visitor<'de> for V {
            type Value = Raw;
            fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
                f.write_str("a YAML value")
            }
            fn visit_str<E: de::Error>(self, v: &str) -> Result<Raw, E> {
                Ok(Raw::Str(v.into()))
            }
            fn visit_string<E: de::Error>(self, v: String) -> Result<Raw, E> {
                Ok(Raw::Str(v))
            }
            fn visit_i64<E: de::Error>(self, v: i64) -> Result<Raw, E> {
                Ok(Raw::Int(v.into()))
            }
            fn visit_u64<E: de::Error>(self, v: u64) -> Result<Raw, E> {
                Ok(Raw::Int(v.into()))
            }
            fn visit_i128<E: de::Error>(self, v: i128) -> Result<Raw, E> {
                Ok(Raw::Int(v))
            }
            fn visit_u128<E: de::Error>(self, v: u128) -> Result<Raw, E> {
                Ok(i128::try_from(v).map(Raw::Int).unwrap_or(Raw::Float(v as f64)))
            }
            fn visit_f64<E: de::Error>(self, v: f64) -> Result<Raw, E> {
                Ok(Raw::Float(v))
            }
            fn visit_bool<E: de::Error>(self, v: bool) -> Result<Raw, E> {
                Ok(Raw::Bool(v))
            }
            fn visit_unit<E: de::Error>(self) -> Result<Raw, E> {
                Ok(Raw::Null)
            }
            fn visit_none<E: de::Error>(self) -> Result<Raw, E> {
                Ok(Raw::Null)
            }
            fn visit_some<D: Deserializer<'de>>(self, d: D) -> Result<Raw, D::Error> {
                Raw::deserialize(d)
            }
            fn visit_seq<A: SeqAccess<'de>>(self, mut a: A) -> Result<Raw, A::Error> {
                let mut v = Vec::new();
                while let Some(x) = a.next_element()? {
                    v.push(x);
                }
                Ok(Raw::Seq(v))
            }
            fn visit_map<A: MapAccess<'de>>(self, mut a: A) -> Result<Raw, A::Error> {
                let mut v = Vec::new();
                while let Some(entry) = a.next_entry()? {
                    v.push(entry);
                }
                Ok(Raw::Map(v))
            }
        }
        d.deserialize_any(V)
    }
}

fn origin_of(loc: serde_saphyr::Location, set: Option<&str>) -> Origin {
    match set {
        Some(arg) => Origin::Set(arg.to_string()),
        None => Origin::File { line: loc.line() as u32, column: loc.column() as u32 },
    }
}

/// The plain scalar written at `loc` in `source`: from its first character
/// to the end of the token (a comma, bracket, brace, comment or line end).
fn written_at(source: &str, loc: serde_saphyr::Location) -> Option<String> {
    let line = source.lines().nth((loc.line() as usize).checked_sub(1)?)?;
    let rest = line.get((loc.column() as usize).checked_sub(1)?..)?;
    let end = rest.find([',', ']', '}', '#']).unwrap_or(rest.len());
    let token = rest[..end].trim();
    (!token.is_empty()).then(|| token.to_string())
}

fn convert(raw: Spanned<Raw>, set: Option<&str>, source: &str) -> Node {
    let origin = origin_of(raw.referenced, set);
    let written = match raw.value {
        Raw::Int(_) | Raw::Float(_) => written_at(source, raw.referenced),
        _ => None,
    };
    let value = match raw.value {
        Raw::Map(entries) => Value::Map(
            entries
                .into_iter()
                .map(|(k, v)| (k.value, origin_of(k.referenced, set), convert(v, set, source)))
                .collect(),
        ),
        Raw::Seq(items) => Value::Seq(items.into_iter().map(|x| convert(x, set, source)).collect()),
        Raw::Str(s) => Value::Str(s),
        Raw::Int(i) => Value::Int(i),
        Raw::Float(f) => Value::Float(f),
        Raw::Bool(b) => Value::Bool(b),
        Raw::Null => Value::Null,
    };
    Node { value, origin, written }
}

/// Largest scenario text accepted (bytes): keeps parsing bounded on any input.
pub const MAX_TEXT_BYTES: usize = 16 * 1024 * 1024;

/// A syntax problem: where (line, column), if known, and what.
type SyntaxProblem = (Option<(u32, u32)>, String);

fn parse_raw(text: &str) -> Result<Spanned<Raw>, SyntaxProblem> {
    if text.len() > MAX_TEXT_BYTES {
        return Err((None, format!("the file is larger than {MAX_TEXT_BYTES} bytes")));
    }
    serde_saphyr::from_str::<Spanned<Raw>>(text).map_err(|e| {
        let loc = e.location().map(|l| (l.line() as u32, l.column() as u32));
        // The error's first line reads "error: line L column C: message".
        let full = e.to_string();
        let first = full.lines().next().unwrap_or("").trim();
        let first = first.strip_prefix("error:").unwrap_or(first).trim();
        let msg = match first.split_once(": ") {
            Some((head, rest)) if head.starts_with("line ") => rest.to_string(),
            _ => first.to_string(),
        };
        (loc, plain_message(&msg))
    })
}

/// The parser's message in the user's terms: no option names or type dumps.
fn plain_message(msg: &str) -> String {
    if let Some(rest) = msg.strip_prefix("duplicate mapping key: ") {
        let key = rest.split(',').next().unwrap_or(rest).trim();
        return format!("the key `{key}` appears twice in one mapping; give each key once");
    }
    if msg.starts_with("budget breached") {
        return "the document expands to too many values (more than 250,000, through anchors `&name` \
                and aliases `*name` used inside each other); write the values out or nest fewer aliases"
            .to_string();
    }
    msg.to_string()
}

/// Checks that `bytes` are UTF-8 text; otherwise names the line and the byte
/// (1-based, counted in that line) where they stop being.
pub fn utf8_text(bytes: &[u8]) -> Result<&str, (u32, usize)> {
    std::str::from_utf8(bytes).map_err(|e| {
        let good = &bytes[..e.valid_up_to()];
        let line = good.iter().filter(|&&b| b == b'\n').count() as u32 + 1;
        let start = good.iter().rposition(|&b| b == b'\n').map_or(0, |i| i + 1);
        (line, good.len() - start + 1)
    })
}

/// Parses a whole scenario document.
pub fn parse_document(text: &str, file: &str) -> Result<Node, ScenarioError> {
    if text.trim().is_empty() {
        return Err(ScenarioError::Syntax {
            file: file.into(),
            line: 1,
            column: 1,
            message: "the file is empty".into(),
        });
    }
    parse_raw(text).map(|r| convert(r, None, text)).map_err(|(loc, message)| {
        let (line, column) = loc.unwrap_or((1, 1));
        ScenarioError::Syntax { file: file.into(), line, column, message }
    })
}

/// Applies one `KEY=VALUE` override given as `--set KEY=VALUE`.
pub fn apply_override(root: &mut Node, arg: &str) -> Result<(), ScenarioError> {
    apply_override_as(root, arg, &format!("--set {arg}"))
}

/// Applies one `KEY=VALUE` override that the user typed as `typed` (e.g.
/// `--vary pipeline.micro_batches=8` or `--stages 8`), which messages name:
/// the value is read as YAML (so `16`, `1f1b`, `2ms` and `[2, 6]` all work);
/// the dotted key walks mappings by name and lists by index; a missing last
/// key is added.
pub fn apply_override_as(root: &mut Node, arg: &str, typed: &str) -> Result<(), ScenarioError> {
    let bad = |message: String| ScenarioError::Override { typed: typed.to_string(), message };
    let (key, raw_value) =
        arg.split_once('=').ok_or_else(|| bad("expected KEY=VALUE, e.g. pipeline.micro_batches=16".into()))?;
    let key = key.trim();
    if key.is_empty() || key.split('.').any(|p| p.is_empty()) {
        return Err(bad(format!("`{key}` is not a dotted key path such as pipeline.micro_batches")));
    }
    let value = if raw_value.trim().is_empty() {
        Node { value: Value::Null, origin: Origin::Set(typed.to_string()), written: None }
    } else {
        parse_raw(raw_value)
            .map(|r| convert(r, Some(typed), raw_value))
            .map_err(|(_, m)| bad(format!("value is not valid YAML: {m}")))?
    };
    let parts: Vec<&str> = key.split('.').collect();
    set_path(root, &parts, 0, value, typed)
}

fn set_path(cur: &mut Node, parts: &[&str], i: usize, value: Node, typed: &str) -> Result<(), ScenarioError> {
    let bad = |message: String| ScenarioError::Override { typed: typed.to_string(), message };
    let part = parts[i];
    let last = i + 1 == parts.len();
    let walked = parts[..=i].join(".");
    if cur.value == Value::Null {
        cur.value = Value::Map(vec![]);
    }
    let child: &mut Node = match &mut cur.value {
        Value::Map(entries) => {
            let pos = match entries.iter().position(|(k, _, _)| k == part) {
                Some(pos) => pos,
                None => {
                    let fresh = Node { value: Value::Null, origin: Origin::Set(typed.into()), written: None };
                    entries.push((part.to_string(), Origin::Set(typed.into()), fresh));
                    entries.len() - 1
                }
            };
            &mut entries[pos].2
        }
        Value::Seq(items) => {
            let idx: usize =
                part.parse().map_err(|_| bad(format!("`{walked}`: a list is indexed by number, not `{part}`")))?;
            let n = items.len();
            items
                .get_mut(idx)
                .ok_or_else(|| bad(format!("`{walked}`: index {idx} is past the end of a list of {n}")))?
        }
        other => {
            let above = parts[..i].join(".");
            return Err(bad(format!("`{above}` is {}, so it has no key `{part}`", other.kind())));
        }
    };
    if last {
        *child = value;
        Ok(())
    } else {
        set_path(child, parts, i + 1, value, typed)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn get<'a>(n: &'a Node, key: &str) -> &'a Node {
        match &n.value {
            Value::Map(e) => &e.iter().find(|(k, _, _)| k == key).unwrap().2,
            _ => panic!("not a map"),
        }
    }

    #[test]
    fn values_remember_line_and_column() {
        let doc = parse_document("a:\n  b: 5ms\n  c: [1, 2]\n", "t.yaml").unwrap();
        let b = get(get(&doc, "a"), "b");
        assert_eq!(b.value, Value::Str("5ms".into()));
        assert_eq!(b.origin, Origin::File { line: 2, column: 6 });
    }

    #[test]
    fn syntax_errors_carry_line_and_column() {
        let err = parse_document("a: [1, 2\nb: c: d\n", "t.yaml").unwrap_err();
        match err {
            ScenarioError::Syntax { line, column, .. } => assert_eq!((line, column), (2, 2)),
            e => panic!("{e:?}"),
        }
        assert!(matches!(parse_document("", "t.yaml"), Err(ScenarioError::Syntax { .. })));
        // Duplicate keys are refused rather than silently overwritten.
        assert!(parse_document("a: 1\na: 2\n", "t.yaml").is_err());
    }

    #[test]
    fn alias_bombs_are_refused() {
        let mut bomb = String::from("a0: &a0 [x, x, x, x, x, x, x, x, x, x]\n");
        for i in 1..12 {
            let prev = i - 1;
            bomb += &format!("a{i}: &a{i} [*a{prev}, *a{prev}, *a{prev}, *a{prev}, *a{prev}, *a{prev}, *a{prev}, *a{prev}, *a{prev}, *a{prev}]\n");
        }
        assert!(parse_document(&bomb, "bomb.yaml").is_err());
    }

    #[test]
    fn overrides_replace_add_and_index() {
        let mut doc = parse_document("p:\n  m: 8\nl:\n  - {f: 1ms}\n", "t.yaml").unwrap();
        apply_override(&mut doc, "p.m=16").unwrap();
        assert_eq!(get(get(&doc, "p"), "m").value, Value::Int(16));
        assert_eq!(get(get(&doc, "p"), "m").origin, Origin::Set("--set p.m=16".into()));
        apply_override(&mut doc, "p.split=[2, 6]").unwrap();
        assert!(matches!(get(get(&doc, "p"), "split").value, Value::Seq(_)));
        apply_override(&mut doc, "l.0.f=2ms").unwrap();
        apply_override(&mut doc, "new.key=x").unwrap();
        assert_eq!(get(get(&doc, "new"), "key").value, Value::Str("x".into()));
        assert!(apply_override(&mut doc, "p.m").is_err());
        assert!(apply_override(&mut doc, "l.7.f=1").unwrap_err().to_string().contains("past the end"));
        assert!(apply_override(&mut doc, "p.m.x=1").unwrap_err().to_string().contains("has no key"));
        assert!(apply_override(&mut doc, "a..b=1").is_err());
    }
}
