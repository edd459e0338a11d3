//! The interactive shell: SQL statements end with ';' and may span lines; shell commands start
//! with '~' and are defined once, in [`COMMANDS`], which drives parsing and help.

use std::time::Instant;

use datafusion::error::Result;
use datafusion::prelude::SessionContext;
use std::sync::{Arc, Mutex};

use datafusion::arrow::array::RecordBatch;
use rustyline::completion::Completer;
use rustyline::error::ReadlineError;
use rustyline::history::DefaultHistory;
use rustyline::{Context, Editor, Helper, Highlighter, Hinter, Validator};

use super::hints::Hints;
use super::output::{Format, Style, render, save_anywhere};
use super::progress::collect_with_progress;
use super::session::open_table;
use super::statements::split;

/// What a shell command does (the shell dispatches on it; nothing matches command names).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Action {
    Sources,
    Add,
    Fits,
    Draw,
    Export,
    Prefer,
    Guide,
    Leave,
}

/// One shell command: its name, argument synopsis, help line and action.
pub struct Command {
    pub name: &'static str,
    pub args: &'static str,
    pub help: &'static str,
    pub action: Action,
}

/// Every shell command: the single definition used for dispatch, help and completion. The set
/// follows the work: the data (`sources`, `add`), the fits (`fits`), pictures (`draw`), results
/// out (`export`), preferences (`prefer`), the guide and leaving.
pub const COMMANDS: &[Command] = &[
    Command {
        name: "sources",
        args: "[TABLE]",
        help: "the open tables with their row counts, or one table's columns and types",
        action: Action::Sources,
    },
    Command {
        name: "add",
        args: "PATH [NAME]",
        help: "add a Parquet/CSV file or folder as a table (quote a path with spaces)",
        action: Action::Add,
    },
    Command {
        name: "fits",
        args: "",
        help: "the fits in the last result: status, rows, dispersion, overdispersion and flagged terms per fit",
        action: Action::Fits,
    },
    Command {
        name: "draw",
        args: "[forest|funnel] [LABEL COLUMN...] [FILE.svg|.png [replace]] [level=L] [widen]",
        help: "draw the last result: rate ratios as a forest plot, observed/expected as a funnel plot; in the terminal, or to a file",
        action: Action::Draw,
    },
    Command {
        name: "export",
        args: "FILE [replace]",
        help: "write the last result to FILE (.csv and .xlsx flat with one row per term, .json nested, .parquet); 'replace' overwrites",
        action: Action::Export,
    },
    Command {
        name: "prefer",
        args: "[layout table|csv|json|markdown | precision N | clock on|off | hints on|off]",
        help: "show or change how results are shown: layout, significant digits, statement clock, one-line hints",
        action: Action::Prefer,
    },
    Command {
        name: "guide",
        args: "[FUNCTION]",
        help: "the commands and ratesheet's SQL functions, or one function's documentation and example",
        action: Action::Guide,
    },
    Command {
        name: "leave",
        args: "",
        help: "leave the shell (Ctrl-D works too)",
        action: Action::Leave,
    },
];

/// Names people may try from habit, with the command that does that here.
const HABITS: &[(&str, &str)] = &[
    ("save", "export"),
    ("quit", "leave"),
    ("exit", "leave"),
    ("help", "guide"),
    ("open", "add"),
    ("tables", "sources"),
    ("columns", "sources TABLE"),
    ("format", "prefer layout"),
    ("digits", "prefer precision"),
    ("timing", "prefer clock"),
];

/// The suggestion for an unknown command name: a habit's counterpart, or commands sharing
/// its first letters.
fn suggestion(name: &str) -> String {
    if let Some((_, to)) = HABITS.iter().find(|(from, _)| *from == name) {
        return format!("; did you mean {PREFIX}{to}?");
    }
    let close: Vec<String> = COMMANDS
        .iter()
        .filter(|c| !name.is_empty() && (c.name.starts_with(&name[..1]) || name.starts_with(c.name)))
        .map(|c| format!("{PREFIX}{}", c.name))
        .collect();
    if close.is_empty() {
        String::new()
    } else {
        format!("; did you mean {}?", close.join(" or "))
    }
}

/// The prompt: the number of the next statement and a marker; a statement continued over
/// several lines shows a dotted bar under it.
pub fn prompt(next: usize, continued: bool) -> String {
    let n = next.to_string();
    if continued {
        format!("{} ┆ ", " ".repeat(n.len()))
    } else {
        format!("{n} ▸ ")
    }
}

/// Splits a command line into words; single or double quotes keep spaces inside a word and a
/// backslash escapes the next character.
pub fn command_words(text: &str) -> Vec<String> {
    let mut words = Vec::new();
    let mut word = String::new();
    let mut in_word = false;
    let mut quote: Option<char> = None;
    let mut chars = text.chars();
    while let Some(c) = chars.next() {
        match (c, quote) {
            ('\\', _) => {
                if let Some(next) = chars.next() {
                    word.push(next);
                }
                in_word = true;
            }
            (q, None) if q == '\'' || q == '"' => {
                quote = Some(q);
                in_word = true;
            }
            (q, Some(open)) if q == open => quote = None,
            (c, None) if c.is_whitespace() => {
                if in_word {
                    words.push(std::mem::take(&mut word));
                    in_word = false;
                }
            }
            (c, _) => {
                word.push(c);
                in_word = true;
            }
        }
    }
    if in_word {
        words.push(word);
    }
    words
}

/// The shell's prefix for commands.
pub const PREFIX: char = '~';

/// Cautions shown by the help command and at start.
pub const CAUTION: &str = "Models are aids to judgement: check the Poisson assumptions (dispersion, overdispersion test) \
before trusting intervals; rate ratios are associations, not causes; where health or safety decisions follow, defer to \
local codes and qualified professional practice.";

/// Words offered by tab completion; refreshed after every statement and command.
#[derive(Helper, Hinter, Highlighter, Validator, Default)]
pub struct Completion {
    words: Arc<Mutex<Vec<String>>>,
}

const KEYWORDS: &[&str] = &[
    "SELECT",
    "FROM",
    "WHERE",
    "GROUP BY",
    "ORDER BY",
    "HAVING",
    "LIMIT",
    "WITH",
    "AS",
    "JOIN",
    "LEFT JOIN",
    "CROSS JOIN",
    "ON",
    "AND",
    "OR",
    "NOT",
    "IN",
    "IS NULL",
    "IS NOT NULL",
    "DISTINCT",
    "COUNT",
    "SUM",
    "AVG",
    "CASE",
    "WHEN",
    "THEN",
    "ELSE",
    "END",
    "CAST",
    "UNION ALL",
    "DESC",
    "ASC",
    "unnest",
    "SET",
    "COPY",
];

impl Completer for Completion {
    type Candidate = String;
    fn complete(&self, line: &str, pos: usize, _ctx: &Context<'_>) -> rustyline::Result<(usize, Vec<String>)> {
        let start = line[..pos]
            .rfind(|c: char| !(c.is_alphanumeric() || c == '_' || c == PREFIX))
            .map_or(0, |i| i + 1);
        let prefix = line[start..pos].to_ascii_lowercase();
        if prefix.is_empty() {
            return Ok((pos, Vec::new()));
        }
        let words = self.words.lock().map(|w| w.clone()).unwrap_or_default();
        let mut found: Vec<String> = words
            .into_iter()
            .filter(|w| w.to_ascii_lowercase().starts_with(&prefix))
            .collect();
        found.sort();
        found.dedup();
        Ok((start, found))
    }
}

/// Tables, columns, ratesheet functions, SQL keywords and shell commands of the session.
async fn completion_words(ctx: &SessionContext) -> Vec<String> {
    let mut words: Vec<String> = KEYWORDS.iter().map(|k| k.to_string()).collect();
    words.extend(COMMANDS.iter().map(|c| format!("{PREFIX}{}", c.name)));
    words.extend(crate::sql::aggregate_functions().iter().map(|f| f.name().to_string()));
    words.extend(crate::sql::scalar_functions().iter().map(|f| f.name().to_string()));
    let sql = "SELECT table_name, column_name FROM information_schema.columns WHERE table_schema = 'public'";
    let batches = match ctx.sql(sql).await {
        Ok(df) => df.collect().await.unwrap_or_default(),
        Err(_) => Vec::new(),
    };
    for b in &batches {
        for c in 0..2 {
            if let Ok(col) =
                datafusion::arrow::compute::cast(b.column(c), &datafusion::arrow::datatypes::DataType::Utf8)
            {
                let names = datafusion::arrow::array::AsArray::as_string::<i32>(&col);
                words.extend(names.iter().flatten().map(str::to_string));
            }
        }
    }
    words
}

pub struct Shell {
    ctx: SessionContext,
    style: Style,
    timing: bool,
    /// Show a progress line on stderr for long statements (only when stderr is a terminal).
    pub progress: bool,
    /// Hints about the statements (see `hints`).
    pub hints: Hints,
    last: Vec<RecordBatch>,
    completion_words: Arc<Mutex<Vec<String>>>,
    /// Statements run so far (the prompt shows the next one's number).
    statements: usize,
}

impl Shell {
    pub fn new(ctx: SessionContext, style: Style) -> Self {
        Shell {
            ctx,
            style,
            timing: true,
            progress: std::io::IsTerminal::is_terminal(&std::io::stderr()),
            hints: Hints::new(true),
            last: Vec::new(),
            completion_words: Arc::default(),
            statements: 0,
        }
    }

    async fn refresh_completion(&self) {
        let words = completion_words(&self.ctx).await;
        if let Ok(mut w) = self.completion_words.lock() {
            *w = words;
        }
    }

    /// Runs the read-execute loop until the user quits.
    pub async fn run(&mut self) -> Result<()> {
        let mut editor: Editor<Completion, DefaultHistory> =
            Editor::new().map_err(|e| datafusion::error::DataFusionError::External(Box::new(e)))?;
        editor.set_helper(Some(Completion {
            words: self.completion_words.clone(),
        }));
        self.refresh_completion().await;
        let history = history_path();
        if let Some(h) = &history {
            let _ = editor.load_history(h);
        }
        println!("ratesheet shell — SQL ends with ';', commands start with '{PREFIX}' ({PREFIX}guide lists them).");
        let mut buffer = String::new();
        loop {
            let prompt = prompt(self.statements + 1, !buffer.trim().is_empty());
            match editor.readline(&prompt) {
                Ok(line) => {
                    let trimmed = line.trim();
                    if buffer.trim().is_empty() && trimmed.starts_with(PREFIX) {
                        let _ = editor.add_history_entry(trimmed);
                        if !self.command(&trimmed[1..]).await {
                            break;
                        }
                        self.refresh_completion().await;
                        continue;
                    }
                    buffer.push_str(&line);
                    buffer.push('\n');
                    let split = split(&buffer);
                    if split.complete.is_empty() {
                        if !split.is_pending() {
                            // Only comments or space: nothing waits for a ';'.
                            buffer.clear();
                        }
                        continue;
                    }
                    let _ = editor.add_history_entry(buffer.trim());
                    for sql in &split.complete {
                        self.statements += 1;
                        // Ctrl-C cancels the rest of the line's statements too.
                        if !self.execute(sql).await {
                            break;
                        }
                    }
                    buffer = if split.is_pending() { split.rest } else { String::new() };
                    self.refresh_completion().await;
                }
                Err(ReadlineError::Interrupted) => buffer.clear(),
                Err(ReadlineError::Eof) => break,
                Err(e) => {
                    eprintln!("error: {e}");
                    break;
                }
            }
        }
        if let Some(h) = &history {
            save_history(&mut editor, h);
        }
        Ok(())
    }

    /// Runs one statement; Ctrl-C cancels it. Errors are printed, never fatal. Returns false
    /// when the statement was cancelled.
    pub async fn execute(&mut self, sql: &str) -> bool {
        let start = Instant::now();
        let ctx = self.ctx.clone();
        let owned = sql.to_string();
        let progress = self.progress;
        let hints = self.hints.clone();
        let mut task = tokio::spawn(async move { collect_with_progress(&ctx, &owned, progress, &hints).await });
        let outcome = tokio::select! {
            r = &mut task => r,
            _ = tokio::signal::ctrl_c() => {
                // Wait for the statement to unwind, so its progress line is erased first.
                task.abort();
                let _ = task.await;
                eprintln!("cancelled");
                return false;
            }
        };
        match outcome {
            Ok(Ok(batches)) => {
                // Follow the terminal's width as the user resizes it.
                let mut style = self.style;
                if style.width.is_some() {
                    style.width = super::output::terminal_width().or(style.width);
                }
                match render(&batches, &style) {
                    Ok(text) => print!("{text}"),
                    Err(e) => eprintln!("error: {e}"),
                }
                if self.timing {
                    eprintln!("{}", footer(&batches, start.elapsed()));
                }
                self.last = batches;
            }
            Ok(Err(e)) => eprintln!("error: {}", super::progress::describe(&e)),
            Err(e) => eprintln!("error: the statement stopped: {e}"),
        }
        true
    }

    /// Handles a shell command; returns false to leave the shell.
    async fn command(&mut self, text: &str) -> bool {
        let words = command_words(text);
        let name = words.first().map(String::as_str).unwrap_or("");
        let args: Vec<&str> = words.iter().skip(1).map(String::as_str).collect();
        let Some(cmd) = COMMANDS.iter().find(|c| c.name == name) else {
            eprintln!(
                "unknown command {PREFIX}{name}{}; {PREFIX}guide lists the commands",
                suggestion(name)
            );
            return true;
        };
        match cmd.action {
            Action::Leave => return false,
            Action::Sources => match args.first() {
                None => self.list_tables().await,
                Some(t) => match self.ctx.table(*t).await {
                    Ok(df) => {
                        for f in df.schema().fields() {
                            println!("{:<24} {}", f.name(), f.data_type());
                        }
                    }
                    Err(e) => eprintln!("error: {e}"),
                },
            },
            Action::Add => match args.first() {
                Some(p) => match open_table(&self.ctx, p, args.get(1).copied()).await {
                    Ok(name) => println!("added {p} as {name}"),
                    Err(e) => eprintln!("error: {e}"),
                },
                None => eprintln!("usage: {PREFIX}add PATH [NAME]"),
            },
            Action::Fits => match super::output::fit_overview(&self.last, self.style.digits) {
                Some(text) => print!("{text}"),
                None => eprintln!("the last result has no fit column"),
            },
            Action::Guide => print_help(args.first().copied()),
            Action::Prefer => self.prefer(&args),
            Action::Draw => {
                let words: Vec<String> = args.iter().map(|w| w.to_string()).collect();
                let drawn = crate::cli::picture::Request::parse(&words).and_then(|request| {
                    let picture = crate::cli::picture::Picture::of(&self.last, &request)?;
                    match &request.file {
                        Some(path) => picture.write(path, request.replace),
                        None => {
                            let glyphs = crate::cli::picture::Glyphs::for_stdout();
                            Ok(picture.text(self.style.width.unwrap_or(100), &glyphs))
                        }
                    }
                });
                match drawn {
                    Ok(text) => println!("{}", text.trim_end()),
                    Err(e) => eprintln!("error: {e}"),
                }
            }
            Action::Export => match args.first() {
                Some(path) => match save_anywhere(
                    &self.ctx,
                    &self.last,
                    path,
                    args.get(1) == Some(&"replace"),
                    &format!("add 'replace' to overwrite it: {PREFIX}export {path} replace"),
                )
                .await
                {
                    Ok(rows) => println!("wrote {rows} rows to {path}"),
                    Err(e) => eprintln!("error: {e}"),
                },
                None => eprintln!("usage: {PREFIX}export FILE [replace]"),
            },
        }
        true
    }

    async fn list_tables(&self) {
        let sql = "SELECT table_name FROM information_schema.tables WHERE table_schema = 'public' ORDER BY 1";
        let Ok(df) = self.ctx.sql(sql).await else { return };
        let Ok(batches) = df.collect().await else { return };
        for b in &batches {
            let names = datafusion::arrow::array::AsArray::as_string::<i32>(b.column(0));
            for n in names.iter().flatten() {
                let n_rows = match self.ctx.table(n).await {
                    Ok(t) => t
                        .count()
                        .await
                        .map(|c| c.to_string())
                        .unwrap_or_else(|e| format!("? ({e})")),
                    Err(e) => format!("? ({e})"),
                };
                println!("{n:<24} {n_rows:>12} rows");
            }
        }
    }

    /// `~prefer`: without arguments the current preferences; with a key and a value, the change
    /// (said back on success).
    fn prefer(&mut self, args: &[&str]) {
        use clap::ValueEnum;
        let on_off = |v: Option<&&str>| match v.copied() {
            Some("on") => Some(true),
            Some("off") => Some(false),
            _ => None,
        };
        let show = |s: &Shell| {
            format!(
                "layout {}, precision {}, clock {}, hints {}",
                format!("{:?}", s.style.format).to_ascii_lowercase(),
                s.style.digits,
                if s.timing { "on" } else { "off" },
                if s.hints.enabled() { "on" } else { "off" }
            )
        };
        match args.first().copied() {
            None => println!("{}", show(self)),
            Some("layout") => match args.get(1).and_then(|f| Format::from_str(f, true).ok()) {
                Some(f) => {
                    self.style.format = f;
                    println!("{}", show(self));
                }
                None => eprintln!("usage: {PREFIX}prefer layout table|csv|json|markdown"),
            },
            Some("precision") => match args
                .get(1)
                .and_then(|d| d.parse::<usize>().ok())
                .filter(|d| (1..=17).contains(d))
            {
                Some(d) => {
                    self.style.digits = d;
                    println!("{}", show(self));
                }
                None => eprintln!("usage: {PREFIX}prefer precision N (1 to 17 significant digits)"),
            },
            Some("clock") => match on_off(args.get(1)) {
                Some(b) => {
                    self.timing = b;
                    println!("{}", show(self));
                }
                None => eprintln!("usage: {PREFIX}prefer clock on|off"),
            },
            Some("hints") => match on_off(args.get(1)) {
                Some(b) => {
                    self.hints.set_enabled(b);
                    println!("{}", show(self));
                }
                None => eprintln!("usage: {PREFIX}prefer hints on|off"),
            },
            Some(other) => eprintln!(
                "{PREFIX}prefer {other}: unknown preference; the preferences are layout, precision, clock, hints"
            ),
        }
    }
}

/// The line after a result: rows and time (`↳ 10 rows · 7 ms`), or `done` for a statement
/// that returns no table (SET, CREATE VIEW).
pub fn footer(batches: &[RecordBatch], elapsed: std::time::Duration) -> String {
    let time = if elapsed.as_secs_f64() < 1.0 {
        format!("{} ms", elapsed.as_millis())
    } else {
        format!("{:.2} s", elapsed.as_secs_f64())
    };
    let columns = batches.first().map_or(0, |b| b.num_columns());
    if columns == 0 {
        return format!("↳ done · {time}");
    }
    let rows: usize = batches.iter().map(|b| b.num_rows()).sum();
    format!("↳ {rows} row{} · {time}", if rows == 1 { "" } else { "s" })
}

/// Prints the command list and the SQL functions, or one function's documentation, wrapped to
/// the terminal's width at word boundaries (nothing is cut).
pub fn print_help(function: Option<&str>) {
    let width = super::output::terminal_width().unwrap_or(100).max(40);
    let udafs = crate::sql::aggregate_functions();
    let udfs = crate::sql::scalar_functions();
    let docs: Vec<(String, &datafusion::logical_expr::Documentation)> = udafs
        .iter()
        .map(|f| (f.name().to_string(), f.documentation()))
        .chain(udfs.iter().map(|f| (f.name().to_string(), f.documentation())))
        .filter_map(|(n, d)| d.map(|d| (n, d)))
        .collect();
    match function {
        Some(name) => match docs.iter().find(|(n, _)| n == name) {
            Some((_, d)) => {
                println!("{}\n", d.syntax_example);
                println!("{}\n", wrap(&d.description, width, 0));
                let arg_w = d.arguments.iter().flatten().map(|(a, _)| a.len()).max().unwrap_or(0);
                for (arg, text) in d.arguments.iter().flatten() {
                    let body = wrap(text, width, arg_w + 4);
                    println!("  {arg:<arg_w$}  {}", body.trim_start());
                }
                if let Some(ex) = &d.sql_example {
                    println!("\nexample:\n{ex}");
                }
            }
            None => eprintln!("no ratesheet function named {name}; {PREFIX}guide lists them"),
        },
        None => {
            println!("shell commands:");
            for c in COMMANDS {
                println!("{}", format!("  {PREFIX}{} {}", c.name, c.args).trim_end());
                println!("{}", wrap(c.help, width, 6));
            }
            println!("\nSQL functions ({PREFIX}guide NAME for details):");
            for (_, d) in &docs {
                println!("  {}", d.syntax_example);
                println!("{}", wrap(first_sentence(&d.description), width, 6));
            }
            println!("\n{}", wrap(CAUTION, width, 0));
        }
    }
}

/// `text` wrapped at word boundaries to `width` columns, every line indented by `indent`.
pub fn wrap(text: &str, width: usize, indent: usize) -> String {
    let room = width.saturating_sub(indent).max(20);
    let pad = " ".repeat(indent);
    let mut lines: Vec<String> = Vec::new();
    let mut line = String::new();
    for word in text.split_whitespace() {
        if !line.is_empty() && line.chars().count() + 1 + word.chars().count() > room {
            lines.push(format!("{pad}{line}"));
            line.clear();
        }
        if !line.is_empty() {
            line.push(' ');
        }
        line.push_str(word);
    }
    if !line.is_empty() {
        lines.push(format!("{pad}{line}"));
    }
    lines.join("\n")
}

/// The first sentence of a description (up to the first ". "), whole.
fn first_sentence(s: &str) -> &str {
    match s.find(". ") {
        Some(i) => &s[..=i],
        None => s,
    }
}

fn history_path() -> Option<std::path::PathBuf> {
    let base = std::env::var_os("XDG_DATA_HOME")
        .map(std::path::PathBuf::from)
        .or_else(|| std::env::var_os("HOME").map(|h| std::path::PathBuf::from(h).join(".local/share")))?;
    let dir = base.join("ratesheet");
    std::fs::create_dir_all(&dir).ok()?;
    Some(dir.join("history.txt"))
}

/// Writes the history to a temporary file and renames it into place, so an interrupted save
/// never leaves a half-written history.
fn save_history(editor: &mut Editor<Completion, DefaultHistory>, path: &std::path::Path) {
    let tmp = path.with_extension("txt.partial");
    if editor.save_history(&tmp).is_ok() {
        let _ = std::fs::rename(&tmp, path);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn command_words_keep_quoted_and_escaped_spaces() {
        assert_eq!(
            command_words("add '/tmp/LC 1977.csv' lc"),
            ["add", "/tmp/LC 1977.csv", "lc"]
        );
        assert_eq!(
            command_words(r#"export "a b.csv" replace"#),
            ["export", "a b.csv", "replace"]
        );
        assert_eq!(command_words(r"add /tmp/LC\ 1977.csv"), ["add", "/tmp/LC 1977.csv"]);
        assert_eq!(command_words("  sources  "), ["sources"]);
    }

    #[test]
    fn unknown_names_get_a_suggestion() {
        assert_eq!(suggestion("quit"), "; did you mean ~leave?");
        assert_eq!(suggestion("dra"), "; did you mean ~draw?");
        assert_eq!(suggestion("zzz"), "");
        assert_eq!(prompt(12, false), "12 ▸ ");
        assert_eq!(prompt(12, true), "   ┆ ");
    }

    #[test]
    fn wrapping_breaks_at_spaces_and_keeps_every_word() {
        let text = "Returns {rate, low, high}: events / exposure with its exact Poisson interval.";
        let w = wrap(text, 30, 4);
        assert!(
            w.lines().all(|l| l.chars().count() <= 30 && l.starts_with("    ")),
            "{w}"
        );
        assert_eq!(
            w.split_whitespace().collect::<Vec<_>>(),
            text.split_whitespace().collect::<Vec<_>>()
        );
    }
}
