//! The one statement splitter, used by the shell, `--run`, `--script` and the demo: statements end
//! at `;` outside quotes ('text', "identifier", E'text with \' escapes') and outside comments
//! (`--` to the end of the line, `/* ... */`). Comments are dropped; a statement holding nothing
//! but space is no statement.

/// Text split into complete statements and what follows the last `;` (an unfinished statement,
/// or nothing but space and comments).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Split {
    pub complete: Vec<String>,
    pub rest: String,
}

impl Split {
    /// Whether the rest holds an unfinished statement.
    pub fn is_pending(&self) -> bool {
        !self.rest.trim().is_empty()
    }
}

/// Splits `text` at every `;` that ends a statement.
pub fn split(text: &str) -> Split {
    let mut complete = Vec::new();
    let mut current = String::new();
    // The open quote, and whether a backslash escapes the next character in it (E'...').
    let mut quote: Option<(char, bool)> = None;
    let mut chars = text.chars().peekable();
    while let Some(c) = chars.next() {
        if let Some((q, escapes)) = quote {
            current.push(c);
            if escapes && c == '\\' {
                if let Some(next) = chars.next() {
                    current.push(next);
                }
            } else if c == q {
                quote = None;
            }
            continue;
        }
        match c {
            '\'' | '"' => {
                let escapes =
                    c == '\'' && current.ends_with(['E', 'e']) && !ends_with_word(&current[..current.len() - 1]);
                quote = Some((c, escapes));
                current.push(c);
            }
            '-' if chars.peek() == Some(&'-') => {
                // A line comment: skip to the end of the line, keep the line break.
                for d in chars.by_ref() {
                    if d == '\n' {
                        current.push('\n');
                        break;
                    }
                }
            }
            '/' if chars.peek() == Some(&'*') => {
                // A block comment: skip to its end, keep a space in its place.
                chars.next();
                let mut last = ' ';
                for d in chars.by_ref() {
                    if last == '*' && d == '/' {
                        break;
                    }
                    last = d;
                }
                current.push(' ');
            }
            ';' => {
                if !current.trim().is_empty() {
                    complete.push(current.trim().to_string());
                }
                current.clear();
            }
            c => current.push(c),
        }
    }
    Split {
        complete,
        rest: current,
    }
}

/// Whether `text` ends with a word character (so that a trailing `E` belongs to a word, as in
/// `WHERE'`... rather than being the `E` of `E'...'`).
fn ends_with_word(text: &str) -> bool {
    text.chars().last().is_some_and(|c| c.is_alphanumeric() || c == '_')
}

/// Every statement of a script, the last one also without its `;`.
pub fn statements(text: &str) -> Vec<String> {
    let Split { mut complete, rest } = split(text);
    if !rest.trim().is_empty() {
        complete.push(rest.trim().to_string());
    }
    complete
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn quotes_and_comments_hide_semicolons() {
        let text = "SELECT 'a;b' AS \"x;y\"; -- one; two\nSELECT 2 -- trailing; comment\n; SELECT 3";
        assert_eq!(
            statements(text),
            vec!["SELECT 'a;b' AS \"x;y\"", "SELECT 2", "SELECT 3"]
        );
    }

    #[test]
    fn an_unfinished_statement_stays_pending() {
        let s = split("SELECT 1; SELECT\n  2");
        assert_eq!(s.complete, vec!["SELECT 1"]);
        assert!(s.is_pending());
        let s = split("SELECT 1; -- done\n");
        assert!(!s.is_pending());
        assert!(split("SELECT 'it''s;'; ").complete == vec!["SELECT 'it''s;'"]);
    }

    #[test]
    fn block_comments_and_escaped_quotes() {
        assert_eq!(
            statements("SELECT 1 /* it's; */ AS a; SELECT E'it\\'s;' AS b; SELECT 'E' AS c"),
            vec!["SELECT 1   AS a", "SELECT E'it\\'s;' AS b", "SELECT 'E' AS c"]
        );
        assert!(!split("/* only a comment */\n").is_pending());
    }
}
