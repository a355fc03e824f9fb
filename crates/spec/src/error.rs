//! Diagnostics: what went wrong in a spec, where (file, line, column) and what was
//! expected, plus [`Errors`], the list the loader returns. `Errors` renders every
//! diagnostic with its source line and a marker through `annotate-snippets`.
//!
//! Validators elsewhere produce only messages; the loader (`resolve/`) attaches
//! the location it knows (habit 5 of STYLE.md).

use std::fmt;
use std::ops::Range;
use std::sync::Arc;

use annotate_snippets::{AnnotationKind, Group, Level, Renderer, Snippet};

/// One problem found in a spec.
#[derive(Debug, Clone, PartialEq)]
pub struct Diagnostic {
    /// Where the text came from: a file path, `--set` for a command-line override,
    /// or `<default>` for a built-in default.
    pub file: String,
    /// 1-based line.
    pub line: usize,
    /// 1-based column (in characters).
    pub col: usize,
    /// Dotted key the problem is about (`replay.burn_in`), empty for syntax errors.
    pub key: String,
    /// What is wrong, as a sentence.
    pub message: String,
    /// What would have been accepted, shown under the marker.
    pub expected: Option<String>,
    /// A hint such as `did you mean "burn_in"?`.
    pub help: Option<String>,
    /// Byte range in the source text.
    pub span: Range<usize>,
    /// Index into the source list held by [`Errors`].
    pub(crate) source: Option<usize>,
}

/// The text of one input (a spec file, one `--set` argument, a default value).
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct SourceText {
    pub name: String,
    pub text: String,
}

/// Every problem found while loading a spec; `Display` (and `Debug`) render them all.
#[derive(Clone)]
pub struct Errors {
    /// The problems, in the order found.
    pub diagnostics: Vec<Diagnostic>,
    pub(crate) sources: Vec<Arc<SourceText>>,
}

impl Errors {
    /// How many problems there are.
    pub fn len(&self) -> usize {
        self.diagnostics.len()
    }
    /// True when there is none (never true for an `Errors` returned by the loader).
    pub fn is_empty(&self) -> bool {
        self.diagnostics.is_empty()
    }
    /// Render with or without terminal colours.
    pub fn render(&self, color: bool) -> String {
        let renderer = if color {
            Renderer::styled()
        } else {
            Renderer::plain()
        };
        let mut out = String::new();
        for d in &self.diagnostics {
            let title = d.message.clone();
            let mut group = Group::with_title(Level::ERROR.primary_title(title.as_str()));
            match d.source.and_then(|i| self.sources.get(i)) {
                Some(src) if !src.text.is_empty() => {
                    let span = clamp_span(&src.text, &d.span);
                    let mut ann = AnnotationKind::Primary.span(span);
                    if let Some(e) = &d.expected {
                        ann = ann.label(e.as_str());
                    }
                    group = group.element(
                        Snippet::source(src.text.as_str())
                            .path(src.name.as_str())
                            .annotation(ann),
                    );
                }
                _ => {
                    let at = format!("at {}:{}:{}", d.file, d.line, d.col);
                    group = group.element(Level::NOTE.message(at));
                    if let Some(e) = &d.expected {
                        group = group.element(Level::NOTE.message(e.as_str()));
                    }
                }
            }
            if let Some(h) = &d.help {
                group = group.element(Level::HELP.message(h.as_str()));
            }
            out.push_str(&renderer.render(&[group]));
            out.push_str("\n\n");
        }
        let n = self.diagnostics.len();
        out.push_str(&format!("{n} error{} found", if n == 1 { "" } else { "s" }));
        out
    }
}

impl fmt::Display for Errors {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(&self.render(false))
    }
}

impl fmt::Debug for Errors {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(&self.render(false))
    }
}

impl std::error::Error for Errors {}

/// A span inside `text` on char boundaries, at least one char wide where possible.
fn clamp_span(text: &str, span: &Range<usize>) -> Range<usize> {
    let mut s = span.start.min(text.len());
    while !text.is_char_boundary(s) {
        s -= 1;
    }
    let mut e = span.end.clamp(s, text.len());
    while !text.is_char_boundary(e) {
        e += 1;
    }
    if e == s {
        if let Some(c) = text[s..].chars().next() {
            if c != '\n' {
                e = s + c.len_utf8();
            }
        }
    }
    s..e
}

/// 1-based line and column (in chars) of byte `at` in `text`.
pub(crate) fn line_col(text: &str, at: usize) -> (usize, usize) {
    let mut at = at.min(text.len());
    while !text.is_char_boundary(at) {
        at -= 1;
    }
    let before = &text[..at];
    let line = before.matches('\n').count() + 1;
    let line_start = before.rfind('\n').map(|i| i + 1).unwrap_or(0);
    let col = before[line_start..].chars().count() + 1;
    (line, col)
}

/// Edit distance with adjacent transpositions (optimal string alignment).
pub(crate) fn distance(a: &str, b: &str) -> usize {
    let a: Vec<char> = a.chars().collect();
    let b: Vec<char> = b.chars().collect();
    let mut d = vec![vec![0usize; b.len() + 1]; a.len() + 1];
    for (i, row) in d.iter_mut().enumerate() {
        row[0] = i;
    }
    for (j, cell) in d[0].iter_mut().enumerate() {
        *cell = j;
    }
    for i in 1..=a.len() {
        for j in 1..=b.len() {
            let cost = usize::from(a[i - 1] != b[j - 1]);
            let mut v = (d[i - 1][j] + 1)
                .min(d[i][j - 1] + 1)
                .min(d[i - 1][j - 1] + cost);
            if i > 1 && j > 1 && a[i - 1] == b[j - 2] && a[i - 2] == b[j - 1] {
                v = v.min(d[i - 2][j - 2] + 1);
            }
            d[i][j] = v;
        }
    }
    d[a.len()][b.len()]
}

/// The candidate nearest to `word`, if it is near enough to be a likely misspelling.
pub(crate) fn nearest<'a>(
    word: &str,
    candidates: impl IntoIterator<Item = &'a str>,
) -> Option<&'a str> {
    let w = word.to_lowercase();
    let limit = if w.chars().count() <= 4 {
        1
    } else {
        2 + w.chars().count() / 8
    };
    let candidates: Vec<&'a str> = candidates.into_iter().collect();
    // A clipped word (`burn` for `burn_in`) is as likely as a misspelling.
    if w.chars().count() >= 3 {
        if let Some(c) = candidates.iter().find(|c| c.to_lowercase().starts_with(&w)) {
            return Some(c);
        }
    }
    candidates
        .into_iter()
        .map(|c| (distance(&w, &c.to_lowercase()), c))
        .filter(|(d, _)| *d <= limit)
        .min_by_key(|(d, _)| *d)
        .map(|(_, c)| c)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn distances() {
        // Textbook values of the restricted edit distance.
        assert_eq!(distance("kitten", "sitting"), 3);
        assert_eq!(distance("burnin", "burn_in"), 1);
        assert_eq!(distance("lenght", "length"), 1);
        assert_eq!(distance("", "abc"), 3);
        assert_eq!(
            nearest("burnin", ["burn_in", "overlap", "sequence"]),
            Some("burn_in")
        );
        assert_eq!(nearest("zzzzzz", ["burn_in", "overlap"]), None);
    }

    #[test]
    fn lines_and_columns() {
        let t = "a = 1\nbé = 2\n";
        assert_eq!(line_col(t, 0), (1, 1));
        assert_eq!(line_col(t, 6), (2, 1));
        assert_eq!(line_col(t, 10), (2, 4)); // b, é, space before `=`
        assert_eq!(line_col(t, 999), (3, 1));
    }
}
