//! Rendering of campaign-file errors: the key path, the line and column, and the line
//! itself with a caret under the problem.
//!
//! Owns: turning a byte span in a source text into a human-readable excerpt.
//! Must not touch: parsing or validation rules.

use std::ops::Range;

/// A located problem in a campaign file (boxed, so that results carrying it stay small).
#[derive(Debug, Clone, PartialEq)]
pub struct SpecError(Box<SpecErrorDetail>);

/// The parts of a [`SpecError`].
#[derive(Debug, Clone, PartialEq)]
pub struct SpecErrorDetail {
    /// The file as the user named it.
    pub file: String,
    /// The key path, e.g. `explore[0].walkers` (empty for a syntax error).
    pub path: String,
    /// What is wrong, in lowercase words.
    pub message: String,
    /// 1-based line and column, when the position is known.
    pub line: Option<usize>,
    pub column: Option<usize>,
    /// The source line and the caret row under it.
    pub excerpt: Option<String>,
}

impl SpecError {
    /// A problem with no position in the file (e.g. the file cannot be read).
    pub fn whole_file(file: &str, message: impl Into<String>) -> Self {
        SpecError(Box::new(SpecErrorDetail {
            file: file.to_string(),
            path: String::new(),
            message: message.into(),
            line: None,
            column: None,
            excerpt: None,
        }))
    }

    /// A problem at `span` of `source`.
    pub fn at(
        file: &str,
        source: &str,
        path: &str,
        span: Option<Range<usize>>,
        message: impl Into<String>,
    ) -> Self {
        let mut e = SpecError::whole_file(file, message);
        e.0.path = path.to_string();
        if let Some(span) = span {
            let (line, column, excerpt) = locate(source, span);
            e.0.line = Some(line);
            e.0.column = Some(column);
            e.0.excerpt = Some(excerpt);
        }
        e
    }

    /// The parts of the error.
    pub fn detail(&self) -> &SpecErrorDetail {
        &self.0
    }
}

impl std::fmt::Display for SpecError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        let d = &self.0;
        match (d.line, d.column) {
            (Some(l), Some(c)) => write!(f, "{}:{l}:{c}: ", d.file)?,
            _ => write!(f, "{}: ", d.file)?,
        }
        if !d.path.is_empty() {
            write!(f, "{}: ", d.path)?;
        }
        write!(f, "{}", d.message)?;
        if let Some(ex) = &d.excerpt {
            write!(f, "\n{ex}")?;
        }
        Ok(())
    }
}

impl std::error::Error for SpecError {}

/// Finds the 1-based line and column of `span.start`, and draws the line with carets
/// under the span (clipped to the line).
fn locate(source: &str, span: Range<usize>) -> (usize, usize, String) {
    let start = span.start.min(source.len());
    let line_start = source[..start].rfind('\n').map(|i| i + 1).unwrap_or(0);
    let line_end = source[start..]
        .find('\n')
        .map(|i| start + i)
        .unwrap_or(source.len());
    let line_no = source[..line_start].matches('\n').count() + 1;
    let text = source[line_start..line_end].trim_end_matches('\r');
    let column = source[line_start..start].chars().count() + 1;
    let width = source[start..span.end.clamp(start, line_end)]
        .chars()
        .count()
        .max(1);
    let gutter = line_no.to_string().len();
    let excerpt = format!(
        "{pad} |\n{line_no} | {text}\n{pad} | {space}{carets}",
        pad = " ".repeat(gutter),
        space = " ".repeat(column - 1),
        carets = "^".repeat(width)
    );
    (line_no, column, excerpt)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn caret_sits_under_the_span() {
        let src = "name = \"x\"\nwalkers = 0\n";
        let start = src.find('0').unwrap();
        let e = SpecError::at(
            "c.toml",
            src,
            "walkers",
            Some(start..start + 1),
            "must be at least 1",
        );
        assert_eq!(
            e.to_string(),
            "c.toml:2:11: walkers: must be at least 1\n  |\n2 | walkers = 0\n  |           ^"
        );
    }
}
