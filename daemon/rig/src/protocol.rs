//! The contracts as PROTOCOL.md states them, for tests: the names in a
//! table's first column, found by the `<!-- anchor -->` comment above the
//! table, so a test compares what the daemon and the tool write with what
//! the page promises, field by field.

use std::collections::BTreeSet;

/// PROTOCOL.md at the workspace's top.
fn protocol_text() -> String {
    let path = concat!(env!("CARGO_MANIFEST_DIR"), "/../../PROTOCOL.md");
    std::fs::read_to_string(path).unwrap_or_else(|e| panic!("{path}: {e}"))
}

/// Every `name` in backticks in the first column of the table under
/// `<!-- anchor -->` (a cell may name several).
pub fn protocol_table(anchor: &str) -> BTreeSet<String> {
    let text = protocol_text();
    let marker = format!("<!-- {anchor} -->");
    let at = text
        .find(&marker)
        .unwrap_or_else(|| panic!("PROTOCOL.md has no table marked {marker}"));
    let mut names = BTreeSet::new();
    let rows = text[at + marker.len()..]
        .lines()
        .skip_while(|l| l.trim().is_empty())
        .take_while(|l| l.starts_with('|'))
        .skip(2); // the header and its rule
    for row in rows {
        let first = row.split('|').nth(1).unwrap_or("");
        names.extend(first.split('`').skip(1).step_by(2).map(str::to_string));
    }
    assert!(!names.is_empty(), "the table marked {marker} names nothing");
    names
}

/// The keys of a JSON object.
pub fn json_keys(v: &serde_json::Value) -> BTreeSet<String> {
    v.as_object()
        .unwrap_or_else(|| panic!("not a JSON object: {v}"))
        .keys()
        .cloned()
        .collect()
}
