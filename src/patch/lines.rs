//! Where each key of a patch file is: key path -> 1-based line number.

use std::collections::HashMap;

/// Line numbers of the keys and array elements of one TOML text, by canonical key path
/// (`stages.sum.inputs[1].r`).
#[derive(Debug, Clone, Default)]
pub(crate) struct LineIndex {
    lines: HashMap<String, usize>,
}

impl LineIndex {
    /// Index `text`. A text that does not parse gives an empty index (the caller reports the
    /// syntax error from its own parse).
    pub(crate) fn new(text: &str) -> LineIndex {
        let mut idx = LineIndex::default();
        let Ok(doc) = toml_edit::ImDocument::parse(text) else {
            return idx;
        };
        let starts = LineStarts::new(text);
        idx.walk_table(doc.as_table(), "", &starts);
        idx
    }

    /// The line of `path`, or of its nearest ancestor that has one.
    pub(crate) fn line_of(&self, path: &str) -> Option<usize> {
        let mut p = path;
        loop {
            if let Some(&n) = self.lines.get(p) {
                return Some(n);
            }
            let cut = p.rfind(['.', '['])?;
            p = &p[..cut];
        }
    }

    fn put(&mut self, path: String, span: Option<std::ops::Range<usize>>, starts: &LineStarts) {
        if let Some(s) = span {
            self.lines
                .entry(path)
                .or_insert_with(|| starts.line(s.start));
        }
    }

    fn walk_table(&mut self, t: &toml_edit::Table, prefix: &str, starts: &LineStarts) {
        if !prefix.is_empty() {
            self.put(prefix.to_string(), t.span(), starts);
        }
        for (k, item) in t.iter() {
            let path = join(prefix, k);
            if let Some(key) = t.key(k) {
                self.put(path.clone(), key.span(), starts);
            }
            self.walk_item(item, &path, starts);
        }
    }

    fn walk_item(&mut self, item: &toml_edit::Item, path: &str, starts: &LineStarts) {
        match item {
            toml_edit::Item::Table(t) => self.walk_table(t, path, starts),
            toml_edit::Item::ArrayOfTables(a) => {
                for (i, t) in a.iter().enumerate() {
                    self.walk_table(t, &format!("{path}[{i}]"), starts);
                }
            }
            toml_edit::Item::Value(v) => self.walk_value(v, path, starts),
            toml_edit::Item::None => {}
        }
    }

    fn walk_value(&mut self, v: &toml_edit::Value, path: &str, starts: &LineStarts) {
        self.put(path.to_string(), v.span(), starts);
        match v {
            toml_edit::Value::Array(a) => {
                for (i, e) in a.iter().enumerate() {
                    self.walk_value(e, &format!("{path}[{i}]"), starts);
                }
            }
            toml_edit::Value::InlineTable(t) => {
                for (k, e) in t.iter() {
                    let p = join(path, k);
                    if let Some(key) = t.key(k) {
                        self.put(p.clone(), key.span(), starts);
                    }
                    self.walk_value(e, &p, starts);
                }
            }
            _ => {}
        }
    }
}

/// `prefix.key`, or `key` at the top.
pub(crate) fn join(prefix: &str, key: &str) -> String {
    if prefix.is_empty() {
        key.to_string()
    } else {
        format!("{prefix}.{key}")
    }
}

/// Byte offsets where each line starts.
pub(crate) struct LineStarts(Vec<usize>);

impl LineStarts {
    pub(crate) fn new(text: &str) -> LineStarts {
        let mut v = vec![0];
        v.extend(text.match_indices('\n').map(|(i, _)| i + 1));
        LineStarts(v)
    }

    /// 1-based line of a byte offset.
    pub(crate) fn line(&self, offset: usize) -> usize {
        self.0.partition_point(|&s| s <= offset).max(1)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn lines_of_keys_tables_and_elements() {
        let text = "[patch]\nrate = 1\n\n[stages.sum]\ninputs = [\n  { from = \"a\", r = 1 },\n  { from = \"b\", r = 2 },\n]\nfeedback = { r = 3 }\n";
        let idx = LineIndex::new(text);
        assert_eq!(idx.line_of("patch"), Some(1));
        assert_eq!(idx.line_of("patch.rate"), Some(2));
        assert_eq!(idx.line_of("stages.sum"), Some(4));
        assert_eq!(idx.line_of("stages.sum.inputs"), Some(5));
        assert_eq!(idx.line_of("stages.sum.inputs[1].r"), Some(7));
        assert_eq!(idx.line_of("stages.sum.inputs[1].c"), Some(7));
        assert_eq!(idx.line_of("stages.sum.feedback.r"), Some(9));
        assert_eq!(idx.line_of("nothing"), None);
    }
}
