//! Changing a few values of a scenario file in place, keeping everything else
//! (comments, order, layout) as the user wrote it.

use crate::node::{parse_document, Node, Origin, Value};
use crate::ScenarioError;

/// Sets each `(dotted key path, YAML value text)` in `text`. An existing
/// value written on one line (a scalar or a `[...]` list) is replaced where it
/// stands; a missing key is added to its mapping (the mapping must exist).
pub fn set_values(text: &str, file: &str, edits: &[(&str, String)]) -> Result<String, ScenarioError> {
    let doc = parse_document(text, file)?;
    let fail = |key: &str, message: String| ScenarioError::Invalid {
        file: file.to_string(),
        key: key.to_string(),
        origin: Origin::Default,
        message,
    };
    // (byte offset, bytes to remove, text to insert), applied last to first.
    let mut changes: Vec<(usize, usize, String)> = Vec::new();
    for (key, value) in edits {
        let parts: Vec<&str> = key.split('.').collect();
        let (parent_path, last) = parts.split_at(parts.len() - 1);
        let parent = walk(&doc, parent_path).ok_or_else(|| fail(key, "its mapping is not in the file".into()))?;
        let Value::Map(entries) = &parent.value else {
            return Err(fail(key, "its parent is not a mapping".into()));
        };
        let Origin::File { line, column } = parent.origin else {
            return Err(fail(key, "its mapping has no place in the file".into()));
        };
        let parent_at = offset(text, line, column).ok_or_else(|| fail(key, "cannot locate its mapping".into()))?;
        match entries.iter().find(|(k, _, _)| k == last[0]) {
            Some((_, _, node)) => {
                let Origin::File { line, column } = node.origin else {
                    return Err(fail(key, "its value has no place in the file".into()));
                };
                let start = offset(text, line, column).ok_or_else(|| fail(key, "cannot locate its value".into()))?;
                let len = value_len(&text[start..], &node.value)
                    .ok_or_else(|| fail(key, "its value spans several lines; edit it by hand".into()))?;
                changes.push((start, len, value.clone()));
            }
            None if text[parent_at..].starts_with('{') => {
                changes.push((parent_at + 1, 0, format!(" {}: {value},", last[0])));
            }
            None => {
                let line_start = text[..parent_at].rfind('\n').map_or(0, |i| i + 1);
                let indent = &text[line_start..parent_at];
                if !indent.chars().all(|c| c == ' ') {
                    return Err(fail(key, "cannot add it next to the other keys; add it by hand".into()));
                }
                changes.push((line_start, 0, format!("{indent}{}: {value}\n", last[0])));
            }
        }
    }
    changes.sort_by_key(|c| std::cmp::Reverse(c.0));
    let mut out = text.to_string();
    for (at, len, insert) in changes {
        out.replace_range(at..at + len, &insert);
    }
    Ok(out)
}

fn walk<'a>(node: &'a Node, path: &[&str]) -> Option<&'a Node> {
    path.iter().try_fold(node, |n, part| match &n.value {
        Value::Map(entries) => entries.iter().find(|(k, _, _)| k == part).map(|(_, _, v)| v),
        _ => None,
    })
}

/// Byte offset of 1-based `line` and character `column`.
fn offset(text: &str, line: u32, column: u32) -> Option<usize> {
    let mut at = 0usize;
    for (i, l) in text.split_inclusive('\n').enumerate() {
        if i + 1 == line as usize {
            let col = l.char_indices().nth(column.saturating_sub(1) as usize).map(|(b, _)| b)?;
            return Some(at + col);
        }
        at += l.len();
    }
    None
}

/// Length in bytes of a one-line value starting at the beginning of `rest`.
fn value_len(rest: &str, value: &Value) -> Option<usize> {
    let line = &rest[..rest.find('\n').unwrap_or(rest.len())];
    match value {
        Value::Seq(_) if line.starts_with('[') => {
            let mut depth = 0;
            for (i, c) in line.char_indices() {
                match c {
                    '[' => depth += 1,
                    ']' => {
                        depth -= 1;
                        if depth == 0 {
                            return Some(i + 1);
                        }
                    }
                    _ => {}
                }
            }
            None
        }
        Value::Seq(_) | Value::Map(_) => None,
        _ => {
            if let Some(q @ ('"' | '\'')) = line.chars().next() {
                return line[1..].find(q).map(|i| i + 2);
            }
            let end = line.find([',', '}', ']', '#']).unwrap_or(line.len());
            Some(line[..end].trim_end().len())
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn replaces_in_place_and_keeps_comments() {
        let t = "# keep me\npipeline:\n  stages: 4   # four\n  split: [2, 2, 2, 2]\n  schedule: 1f1b\n";
        let out =
            set_values(t, "t.yaml", &[("pipeline.split", "[3, 2, 2, 1]".into()), ("pipeline.stages", "4".into())])
                .unwrap();
        assert_eq!(out, "# keep me\npipeline:\n  stages: 4   # four\n  split: [3, 2, 2, 1]\n  schedule: 1f1b\n");
        let out = set_values("pipeline:\n  split: even\n", "t.yaml", &[("pipeline.split", "[1, 2]".into())]).unwrap();
        assert_eq!(out, "pipeline:\n  split: [1, 2]\n");
    }

    #[test]
    fn adds_missing_keys_to_block_and_flow_mappings() {
        let out = set_values("pipeline:\n  stages: 2\n", "t.yaml", &[("pipeline.split", "[1, 2]".into())]).unwrap();
        assert_eq!(out, "pipeline:\n  split: [1, 2]\n  stages: 2\n");
        let out =
            set_values("pipeline: { stages: 2, schedule: 1f1b }\n", "t.yaml", &[("pipeline.split", "[1, 2]".into())])
                .unwrap();
        assert_eq!(out, "pipeline: { split: [1, 2], stages: 2, schedule: 1f1b }\n");
        let out = set_values("p: { stages: 2, split: even }\n", "t.yaml", &[("p.split", "[1, 1]".into())]).unwrap();
        assert_eq!(out, "p: { stages: 2, split: [1, 1] }\n");
    }

    #[test]
    fn refuses_what_it_cannot_edit_safely() {
        assert!(set_values("pipeline:\n  split:\n    - 1\n    - 2\n", "t.yaml", &[("pipeline.split", "[3]".into())])
            .is_err());
        assert!(set_values("a: 1\n", "t.yaml", &[("pipeline.split", "[3]".into())]).is_err());
    }
}
