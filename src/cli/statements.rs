//! The one statement splitter, used by the shell, `-e`, `--script` and the demo: statements end
//! at `;` outside quotes ('text', "identifier") and outside `--` comments, which run to the end
//! of their line. Comments are dropped; a statement holding nothing but space is no statement.

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
    let mut quote: Option<char> = None;
    let mut chars = text.chars().peekable();
    while let Some(c) = chars.next() {
        match (quote, c) {
            (Some(q), c) if c == q => {
                quote = None;
                current.push(c);
            }
            (Some(_), c) => current.push(c),
            (None, '\'' | '"') => {
                quote = Some(c);
                current.push(c);
            }
            (None, '-') if chars.peek() == Some(&'-') => {
                // A comment: skip to the end of the line, keep the line break.
                for d in chars.by_ref() {
                    if d == '\n' {
                        current.push('\n');
                        break;
                    }
                }
            }
            (None, ';') => {
                if !current.trim().is_empty() {
                    complete.push(current.trim().to_string());
                }
                current.clear();
            }
            (None, c) => current.push(c),
        }
    }
    Split {
        complete,
        rest: current,
    }
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
}
