//! Problems found in a TOML file, each located by its TOML path and line:column.
//!
//! Validation collects every problem it finds before reporting, so an engineer fixes a file in
//! one pass; this module turns a path like `location.ucl` into the line and column where that
//! value (or, when it is missing, its nearest enclosing table) stands in the text.

use std::fmt;
use std::ops::Range;

use toml::de::{DeTable, DeValue};

/// One problem: where, and what is wrong (what was found and what would be right).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Problem {
    pub line: usize,
    pub column: usize,
    /// Dotted TOML path, e.g. `location.ucl` or `provenance.excluded[2].subgroup`.
    pub path: String,
    pub message: String,
}

/// Every problem found in one file. Its `Display` is one line per problem:
/// `cell.toml:14:9: location.ucl: 11.9 is not above the centre line 12.0`.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub struct Problems {
    pub file: String,
    pub problems: Vec<Problem>,
}

impl fmt::Display for Problems {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        for (i, p) in self.problems.iter().enumerate() {
            if i > 0 {
                writeln!(f)?;
            }
            write!(f, "{}:{}:{}: ", self.file, p.line, p.column)?;
            if !p.path.is_empty() {
                write!(f, "{}: ", p.path)?;
            }
            write!(f, "{}", p.message)?;
        }
        Ok(())
    }
}

/// Finds the text position of TOML paths in one document.
pub struct Locator<'a> {
    text: &'a str,
    /// The document with spans, parsed only when a problem has to be located (a valid file,
    /// the usual case, is parsed once, by serde).
    root: std::cell::OnceCell<Option<DeTable<'a>>>,
}

impl<'a> Locator<'a> {
    /// Indexes `text`. A document that does not parse still gives positions (of line 1).
    pub fn new(text: &'a str) -> Self {
        Locator {
            text,
            root: std::cell::OnceCell::new(),
        }
    }

    /// The byte span of `path`, or of its deepest ancestor present in the text.
    pub fn span(&self, path: &str) -> Range<usize> {
        let root = self
            .root
            .get_or_init(|| DeTable::parse(self.text).ok().map(|t| t.into_inner()));
        let Some(root) = root else {
            return 0..0;
        };
        let mut best = 0..0;
        let mut table = Some(root);
        let mut value: Option<&DeValue> = None;
        for seg in segments(path) {
            let next = match (seg, table, value) {
                (Seg::Key(k), Some(t), _) => t.get(k),
                (Seg::Index(i), _, Some(DeValue::Array(a))) => a.get(i),
                _ => None,
            };
            let Some(next) = next else { break };
            best = next.span();
            value = Some(next.get_ref());
            table = match next.get_ref() {
                DeValue::Table(t) => Some(t),
                _ => None,
            };
        }
        best
    }

    /// The byte span of the key at the end of `path` (where a person typed the name), else
    /// as [`Locator::span`].
    pub fn key_span(&self, path: &str) -> Range<usize> {
        let segs = segments(path);
        let (Some(Seg::Key(last)), parent) = (segs.last(), path.rfind('.').map(|i| &path[..i]))
        else {
            return self.span(path);
        };
        let root = self
            .root
            .get_or_init(|| DeTable::parse(self.text).ok().map(|t| t.into_inner()));
        let Some(root) = root else {
            return 0..0;
        };
        let mut table = Some(root);
        let mut value: Option<&DeValue> = None;
        for seg in parent.map(segments).unwrap_or_default() {
            let next = match (seg, table, value) {
                (Seg::Key(k), Some(t), _) => t.get(k),
                (Seg::Index(i), _, Some(DeValue::Array(a))) => a.get(i),
                _ => None,
            };
            let Some(next) = next else {
                return self.span(path);
            };
            value = Some(next.get_ref());
            table = match next.get_ref() {
                DeValue::Table(t) => Some(t),
                _ => None,
            };
        }
        table
            .and_then(|t| t.iter().find(|(k, _)| k.get_ref() == last))
            .map(|(k, _)| k.span())
            .unwrap_or_else(|| self.span(path))
    }

    /// A problem at the key of `path` (an unknown key: the name is the mistake).
    pub fn key_problem(&self, path: &str, message: impl Into<String>) -> Problem {
        let (line, column) = self.line_col(self.key_span(path).start);
        Problem {
            line,
            column,
            path: path.to_string(),
            message: message.into(),
        }
    }

    /// 1-based line and column of a byte offset.
    pub fn line_col(&self, offset: usize) -> (usize, usize) {
        let before = &self.text[..offset.min(self.text.len())];
        let line = before.matches('\n').count() + 1;
        let column = before.rsplit('\n').next().map_or(0, |l| l.chars().count()) + 1;
        (line, column)
    }

    /// A problem at `path`.
    pub fn problem(&self, path: &str, message: impl Into<String>) -> Problem {
        let (line, column) = self.line_col(self.span(path).start);
        Problem {
            line,
            column,
            path: path.to_string(),
            message: message.into(),
        }
    }

    /// A problem from a parse or deserialization error, at the span the error names.
    pub fn from_toml_error(&self, e: &toml::de::Error) -> Problem {
        let (line, column) = self.line_col(e.span().map_or(0, |s| s.start));
        Problem {
            line,
            column,
            path: String::new(),
            message: e.message().trim().to_string(),
        }
    }
}

enum Seg<'p> {
    Key(&'p str),
    Index(usize),
}

fn segments(path: &str) -> Vec<Seg<'_>> {
    let mut out = Vec::new();
    for part in path.split('.').filter(|p| !p.is_empty()) {
        let mut rest = part;
        if let Some(b) = rest.find('[') {
            out.push(Seg::Key(&rest[..b]));
            rest = &rest[b..];
            while let Some(stripped) = rest.strip_prefix('[') {
                let end = stripped.find(']').unwrap_or(stripped.len());
                if let Ok(i) = stripped[..end].parse() {
                    out.push(Seg::Index(i));
                }
                rest = stripped.get(end + 1..).unwrap_or("");
            }
        } else {
            out.push(Seg::Key(rest));
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn locates_nested_values_and_falls_back_to_the_table() {
        let text = "a = 1\n[b]\nc = 2\nlist = [{ d = 3 }, { d = 4 }]\n";
        let loc = Locator::new(text);
        assert_eq!(loc.problem("a", "x").line, 1);
        let c = loc.problem("b.c", "x");
        assert_eq!((c.line, c.column), (3, 5));
        let d = loc.problem("b.list[1].d", "x");
        assert_eq!(d.line, 4);
        assert_eq!(d.column, 26);
        // A missing key points at its table.
        assert_eq!(loc.problem("b.missing", "x").line, 2);
    }
}
