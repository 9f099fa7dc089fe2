//! The labels file: one class name a line, in the model's output order.

use std::collections::HashSet;

/// Parse a labels file. Blank lines at the end are ignored; blank or repeated labels
/// elsewhere are errors (they would make answers ambiguous).
///
/// # Errors
/// A message naming the file, the line and what was wrong.
pub fn parse(bytes: &[u8], file: &str) -> Result<Vec<String>, String> {
    let text = std::str::from_utf8(bytes).map_err(|e| format!("{file}: not UTF-8 text ({e})"))?;
    // A byte-order mark (spreadsheets and some editors write one) is not part of the first label.
    let text = text.strip_prefix('\u{feff}').unwrap_or(text);
    let mut lines: Vec<&str> = text.lines().map(|l| l.trim_end_matches('\r').trim()).collect();
    while lines.last().is_some_and(|l| l.is_empty()) {
        lines.pop();
    }
    if lines.is_empty() {
        return Err(format!("{file}: no labels (expected one class name a line)"));
    }
    let mut seen = HashSet::new();
    for (i, l) in lines.iter().enumerate() {
        if l.is_empty() {
            return Err(format!("{file}: line {} is blank (expected one class name a line)", i + 1));
        }
        if !seen.insert(*l) {
            return Err(format!("{file}: line {}: label {l:?} appears twice", i + 1));
        }
    }
    Ok(lines.into_iter().map(String::from).collect())
}

#[cfg(test)]
mod tests {
    use super::parse;

    #[test]
    fn reads_lines_in_order_and_ignores_trailing_blanks() {
        let l = parse(b"good\r\ncracked\n burr \n\n\n", "c.txt").unwrap();
        assert_eq!(l, ["good", "cracked", "burr"]);
        let l = parse("\u{feff}good\nburr\n".as_bytes(), "c.txt").unwrap();
        assert_eq!(l, ["good", "burr"], "a byte-order mark is not part of the first label");
    }

    #[test]
    fn refuses_blank_repeated_or_empty() {
        assert!(parse(b"a\n\nb\n", "c.txt").unwrap_err().contains("line 2 is blank"));
        assert!(parse(b"a\nb\na\n", "c.txt").unwrap_err().contains("line 3: label \"a\" appears twice"));
        assert!(parse(b"\n\n", "c.txt").unwrap_err().contains("c.txt: no labels"));
        assert!(parse(&[0xff, 0xfe], "c.txt").unwrap_err().contains("not UTF-8"));
    }
}
