//! `send --items FILE.jsonl`: one item a line, with optional external metric values.
//!
//! Each line is an object with `id` (string or whole number: a segment id) or `source` (live
//! traffic, looked up by its source text) or neither; `hypothesis` (optional); `scores` (an
//! object of external metric name to number, optional); `key` (optional: the item's key for
//! the bootstrap weights of its scores, needed when it has neither id nor source). Other
//! fields are refused so that a misspelt one is not silently ignored. Values are checked by
//! the server against the session's declaration.

use serde_json::{Map, Value};

use super::CliError;
use crate::pb;

/// Fields a line may carry.
const FIELDS: &[&str] = &["id", "source", "hypothesis", "scores", "key"];

/// Parse a JSONL items file; `name` labels errors (with the line number).
pub(super) fn parse_items(name: &str, bytes: &[u8]) -> Result<Vec<pb::ScoreItem>, CliError> {
    let text = std::str::from_utf8(bytes).map_err(|e| CliError::Usage(format!("{name}: not UTF-8 ({e})")))?;
    let mut out = Vec::new();
    for (n, line) in text.lines().enumerate() {
        if line.trim().is_empty() {
            continue;
        }
        let bad = |why: String| CliError::Usage(format!("{name}:{}: {why}", n + 1));
        let v: Value = serde_json::from_str(line).map_err(|e| bad(format!("not JSON ({e})")))?;
        let Value::Object(obj) = v else { return Err(bad("not a JSON object".into())) };
        out.push(item_of(&obj).map_err(bad)?);
    }
    Ok(out)
}

fn item_of(obj: &Map<String, Value>) -> Result<pb::ScoreItem, String> {
    if let Some(k) = obj.keys().find(|k| !FIELDS.contains(&k.as_str())) {
        return Err(format!("unknown field '{k}' (fields: {})", FIELDS.join(", ")));
    }
    let text = |f: &str| -> Result<Option<String>, String> {
        match obj.get(f) {
            None => Ok(None),
            Some(Value::String(s)) => Ok(Some(s.clone())),
            Some(_) => Err(format!("'{f}' must be a string")),
        }
    };
    let id = match obj.get("id") {
        None => None,
        Some(Value::String(s)) => Some(s.clone()),
        Some(Value::Number(x)) if x.is_u64() => Some(x.to_string()),
        Some(_) => return Err("'id' must be a string or a whole number".into()),
    };
    let key = match (id, text("source")?) {
        (Some(_), Some(_)) => return Err("give 'id' or 'source', not both".into()),
        (Some(id), None) => Some(pb::score_item::Key::SegmentId(id)),
        (None, Some(src)) => Some(pb::score_item::Key::Source(src)),
        (None, None) => None,
    };
    let mut external = std::collections::HashMap::new();
    match obj.get("scores") {
        None => {}
        Some(Value::Object(m)) => {
            for (k, v) in m {
                let x = v.as_f64().ok_or_else(|| format!("scores.{k} must be a number"))?;
                external.insert(k.clone(), x);
            }
        }
        Some(_) => return Err("'scores' must be an object of name to number".into()),
    }
    // No "hypothesis": the line carries scores only; "hypothesis": "" is an empty translation.
    let given = text("hypothesis")?;
    if given.is_none() && external.is_empty() {
        return Err("neither a hypothesis nor scores".into());
    }
    let values_only = given.is_none();
    Ok(pb::ScoreItem { key, hypothesis: given.unwrap_or_default(), external, item_key: text("key")?.unwrap_or_default(), values_only })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn lines_become_items() {
        let file = r#"{"id": "notice-0001", "hypothesis": "Die Fähre fährt.", "scores": {"qe": 0.82}}
{"id": 7, "hypothesis": "Boje."}

{"source": "Gate C is closed.", "scores": {"qe": 0.5, "edit_rate": 12.25}}
{"key": "call-9", "scores": {"qe": 0.1}}
"#;
        let items = parse_items("items.jsonl", file.as_bytes()).unwrap();
        assert_eq!(items.len(), 4);
        assert_eq!(items[0].key, Some(pb::score_item::Key::SegmentId("notice-0001".into())));
        assert_eq!(items[0].external.get("qe"), Some(&0.82));
        assert_eq!(items[1].key, Some(pb::score_item::Key::SegmentId("7".into())));
        assert!(items[1].external.is_empty());
        assert_eq!((items[2].hypothesis.as_str(), items[2].external.len(), items[2].values_only), ("", 2, true));
        assert!(!items[0].values_only && !items[1].values_only && items[3].values_only);
        assert_eq!((items[3].key.clone(), items[3].item_key.as_str()), (None, "call-9"));
    }

    #[test]
    fn bad_lines_name_the_file_line_and_field() {
        let err = |s: &str| parse_items("items.jsonl", format!("{{\"id\": \"a\", \"hypothesis\": \"x\"}}\n{s}\n").as_bytes()).unwrap_err().to_string();
        assert!(err(r#"{"id": "b", "hypothesys": "x"}"#).starts_with("items.jsonl:2: unknown field 'hypothesys'"));
        assert!(err(r#"{"id": "b", "source": "s", "hypothesis": "x"}"#).contains("not both"));
        assert!(err(r#"{"id": "b", "scores": {"qe": "high"}}"#).contains("scores.qe"));
        assert!(err(r#"{"id": "b", "scores": [0.5]}"#).contains("'scores'"));
        assert!(err(r#"{"id": "b"}"#).contains("neither"));
        assert!(err(r#"{"id": 1.5, "hypothesis": "x"}"#).contains("'id'"));
        assert!(err("[1]").contains("object"));
        assert!(err("{").contains("not JSON"));
    }
}
