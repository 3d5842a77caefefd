//! Errors found in a sweep file, each with its place in the file.

use std::fmt;

/// One problem in a sweep file: where it is, which key, and what would be valid.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct SpecError {
    /// The file name as given to [`crate::spec::parse`].
    pub file: String,
    /// 1-based line of the offending key or value.
    pub line: usize,
    /// 1-based column (in characters) of the offending key or value.
    pub column: usize,
    /// Dotted path of the key, e.g. `params.density.scale` or `target[2].sd`;
    /// empty for a problem with the file as a whole.
    pub key: String,
    /// What is wrong and what would be valid.
    pub message: String,
}

impl fmt::Display for SpecError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        if self.key.is_empty() {
            write!(
                f,
                "{}:{}:{}: {}",
                self.file, self.line, self.column, self.message
            )
        } else {
            write!(
                f,
                "{}:{}:{}: {}: {}",
                self.file, self.line, self.column, self.key, self.message
            )
        }
    }
}

impl std::error::Error for SpecError {}

/// Every problem found in a sweep file, in the order they appear in the file.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct SpecErrors(pub Vec<SpecError>);

impl SpecErrors {
    /// Number of problems.
    pub fn len(&self) -> usize {
        self.0.len()
    }

    /// True when there is no problem (a parse never returns this).
    pub fn is_empty(&self) -> bool {
        self.0.is_empty()
    }

    /// The problems, in file order.
    pub fn iter(&self) -> std::slice::Iter<'_, SpecError> {
        self.0.iter()
    }
}

impl fmt::Display for SpecErrors {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        for (i, e) in self.0.iter().enumerate() {
            if i > 0 {
                writeln!(f)?;
            }
            write!(f, "{e}")?;
        }
        Ok(())
    }
}

impl std::error::Error for SpecErrors {}

/// Converts byte offsets in the sweep file into 1-based line and column numbers.
#[derive(Debug)]
pub(crate) struct LineIndex<'a> {
    text: &'a str,
    /// Byte offset at which each line starts.
    starts: Vec<usize>,
}

impl<'a> LineIndex<'a> {
    pub(crate) fn new(text: &'a str) -> Self {
        let mut starts = vec![0];
        starts.extend(text.match_indices('\n').map(|(i, _)| i + 1));
        LineIndex { text, starts }
    }

    /// Line and column (both 1-based; the column counts characters) of a byte offset.
    pub(crate) fn line_col(&self, offset: usize) -> (usize, usize) {
        let offset = offset.min(self.text.len());
        let line = match self.starts.binary_search(&offset) {
            Ok(i) => i,
            Err(i) => i - 1,
        };
        let start = self.starts[line];
        let column = self
            .text
            .get(start..offset)
            .map_or(offset - start, |s| s.chars().count())
            + 1;
        (line + 1, column)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn line_col_counts_from_one() {
        let idx = LineIndex::new("ab\ncd\n\né");
        assert_eq!(idx.line_col(0), (1, 1));
        assert_eq!(idx.line_col(1), (1, 2));
        assert_eq!(idx.line_col(3), (2, 1));
        assert_eq!(idx.line_col(6), (3, 1));
        assert_eq!(idx.line_col(7), (4, 1));
        assert_eq!(idx.line_col(9), (4, 2));
    }
}
