//! The `ratesheet` command: open Parquet/CSV files as tables and run SQL with per-group Poisson
//! fits, interactively or from a query string or script.

use std::process::ExitCode;

use clap::Parser;
use ratesheet::cli::render::{Format, Style, render};
use ratesheet::cli::session::{SessionSettings, new_session, open_table};
use ratesheet::cli::shell::Shell;

#[derive(Parser, Debug)]
#[command(
    name = "ratesheet",
    version,
    about = "Per-group Poisson rate models in SQL over Parquet and CSV files",
    after_help = "Examples:\n  ratesheet pipes.parquet                      open the shell with table 'pipes'\n  \
                  ratesheet data/ -e 'SELECT district, poisson_fit(breaks, km_years, material) AS fit FROM data GROUP BY district;'\n  \
                  ratesheet breaks.csv --script fits.sql --format csv"
)]
struct Args {
    /// Parquet/CSV files or folders to open as tables (named after the file stem).
    paths: Vec<String>,
    /// Run these SQL statements (separated by ';') and exit.
    #[arg(short = 'e', long = "execute", value_name = "SQL")]
    execute: Option<String>,
    /// Run the statements in this file and exit.
    #[arg(long, value_name = "FILE")]
    script: Option<String>,
    /// How results are printed.
    #[arg(long, value_enum, default_value = "table")]
    format: Format,
    /// Significant digits of numbers in table output.
    #[arg(long, default_value_t = 5)]
    digits: usize,
    /// Worker threads (default: all cores).
    #[arg(long)]
    threads: Option<usize>,
    /// Memory limit, e.g. 512M or 4G; aggregates spill to disk beyond it.
    #[arg(long, value_name = "BYTES")]
    memory_limit: Option<String>,
}

fn parse_bytes(s: &str) -> Result<usize, String> {
    let s = s.trim();
    let (num, mult) = match s.chars().last().map(|c| c.to_ascii_uppercase()) {
        Some('K') => (&s[..s.len() - 1], 1usize << 10),
        Some('M') => (&s[..s.len() - 1], 1 << 20),
        Some('G') => (&s[..s.len() - 1], 1 << 30),
        _ => (s, 1),
    };
    num.trim()
        .parse::<f64>()
        .ok()
        .filter(|v| *v > 0.0)
        .map(|v| (v * mult as f64) as usize)
        .ok_or_else(|| format!("--memory-limit {s}: expected a size such as 512M or 4G"))
}

/// Splits a script into statements at ';' outside quotes.
fn statements(text: &str) -> Vec<String> {
    let mut out = Vec::new();
    let mut cur = String::new();
    let mut quote: Option<char> = None;
    for line in text.lines() {
        let line = if quote.is_none() && line.trim_start().starts_with("--") {
            ""
        } else {
            line
        };
        for c in line.chars() {
            match (quote, c) {
                (None, '\'' | '"') => quote = Some(c),
                (Some(q), c) if c == q => quote = None,
                (None, ';') => {
                    if !cur.trim().is_empty() {
                        out.push(std::mem::take(&mut cur));
                    }
                    cur.clear();
                    continue;
                }
                _ => {}
            }
            cur.push(c);
        }
        cur.push('\n');
    }
    if !cur.trim().is_empty() {
        out.push(cur);
    }
    out
}

#[tokio::main]
async fn main() -> ExitCode {
    let args = Args::parse();
    let memory_limit = match args.memory_limit.as_deref().map(parse_bytes).transpose() {
        Ok(m) => m,
        Err(e) => {
            eprintln!("error: {e}");
            return ExitCode::from(2);
        }
    };
    let ctx = match new_session(&SessionSettings {
        threads: args.threads,
        memory_limit,
    }) {
        Ok(c) => c,
        Err(e) => {
            eprintln!("error: {e}");
            return ExitCode::FAILURE;
        }
    };
    let interactive = args.execute.is_none() && args.script.is_none();
    for p in &args.paths {
        match open_table(&ctx, p, None).await {
            Ok(name) if interactive => eprintln!("opened {p} as {name}"),
            Ok(_) => {}
            Err(e) => {
                eprintln!("error: {e}");
                if !interactive {
                    return ExitCode::FAILURE;
                }
            }
        }
    }
    let style = Style {
        format: args.format,
        digits: args.digits,
        max_rows: if interactive { 40 } else { usize::MAX },
    };
    let text = match (&args.execute, &args.script) {
        (Some(sql), _) => sql.clone(),
        (None, Some(path)) => match std::fs::read_to_string(path) {
            Ok(t) => t,
            Err(e) => {
                eprintln!("error: {path}: {e}");
                return ExitCode::FAILURE;
            }
        },
        (None, None) => {
            let mut shell = Shell::new(ctx, style);
            return match shell.run().await {
                Ok(()) => ExitCode::SUCCESS,
                Err(e) => {
                    eprintln!("error: {e}");
                    ExitCode::FAILURE
                }
            };
        }
    };
    for (k, sql) in statements(&text).iter().enumerate() {
        let result = async { ctx.sql(sql).await?.collect().await }.await;
        match result.and_then(|b| render(&b, &style)) {
            Ok(out) => print!("{out}"),
            Err(e) => {
                eprintln!("error in statement {}: {e}", k + 1);
                return ExitCode::FAILURE;
            }
        }
    }
    ExitCode::SUCCESS
}
