//! The `ratesheet` command: open Parquet/CSV files as tables and run SQL with per-group Poisson
//! fits, interactively or from a query string or script.

use std::process::ExitCode;

use clap::Parser;
use ratesheet::cli::hints::Hints;
use ratesheet::cli::output::{Format, Style, render, save_anywhere};
use ratesheet::cli::progress::collect_with_progress;
use ratesheet::cli::session::{SessionSettings, new_session, open_table};
use ratesheet::cli::shell::Shell;
use ratesheet::cli::statements::statements;
use std::io::IsTerminal;

/// mimalloc instead of the system allocator: aggregations allocate and free many large
/// buffers, which glibc's allocator returns to the OS and faults in again (measured with
/// `cargo bench --bench fits`; see DEVELOPERS.md).
#[global_allocator]
static ALLOCATOR: mimalloc::MiMalloc = mimalloc::MiMalloc;

#[derive(Parser, Debug)]
#[command(
    name = "ratesheet",
    version,
    about = "Per-group Poisson rate models in SQL over Parquet and CSV files",
    after_help = "Examples:\n  ratesheet demo                               the narrated demo on the bundled data\n  \
                  ratesheet pipes.parquet                      open the shell with table 'pipes'\n  \
                  ratesheet data/ --run 'SELECT district, poisson_fit(breaks, km_years, material) AS fit FROM data GROUP BY district;'\n  \
                  ratesheet breaks.csv --script fits.sql --format csv\n  \
                  ratesheet breaks.csv --script fits.sql --save-to fits.xlsx   results straight to a spreadsheet\n  \
                  ratesheet breaks.csv --script fits.sql --draw-to fits.svg    a picture of the last result\n\n\
                  'ratesheet demo' runs the demo; 'ratesheet demo-data DIR' writes the demo's files to DIR."
)]
struct Args {
    /// Parquet/CSV files or folders to open as tables (named after the file stem).
    paths: Vec<String>,
    /// Run the given SQL statements (separated by ';'), print their results, and exit.
    #[arg(long = "run", value_name = "SQL")]
    run: Option<String>,
    /// Run the statements in this file and exit.
    #[arg(long, value_name = "FILE")]
    script: Option<String>,
    /// How results are printed (to write .xlsx or .parquet files, use --save-to FILE).
    #[arg(long, value_enum, default_value = "table")]
    format: Format,
    /// Significant digits of numbers in table output, 1 to 17.
    #[arg(long, default_value_t = 5, value_parser = clap::value_parser!(u8).range(1..=17))]
    digits: u8,
    /// Worker threads (default: all cores).
    #[arg(long)]
    threads: Option<usize>,
    /// Memory limit, e.g. 512M, 4G, 2GB or 1.5GiB (K, M, G with or without B or iB, all powers
    /// of 1024); aggregates spill to disk beyond it.
    #[arg(long, value_name = "BYTES")]
    memory_limit: Option<String>,
    /// Never show the progress line (it shows only on a terminal, for statements over a second).
    #[arg(long)]
    no_progress: bool,
    /// Never print hints (such as the one about dividing whole numbers).
    #[arg(long)]
    no_hints: bool,
    /// Also write the last statement's result to FILE (.csv, .json, .parquet or .xlsx).
    #[arg(long, value_name = "FILE")]
    save_to: Option<String>,
    /// Let --save-to and --draw-to overwrite an existing file.
    #[arg(long)]
    replace: bool,
    /// Also draw the last statement's result to FILE (.svg or .png): a funnel plot when it has
    /// observed and expected counts, otherwise a forest plot of its estimates and intervals.
    #[arg(long, value_name = "FILE")]
    draw_to: Option<String>,
}

/// A size such as `512M`, `4G`, `2GB` or `1.5GiB`: K, M and G (optionally followed by `B` or
/// `iB`, any case) are all powers of 1024; a bare number is bytes.
fn parse_bytes(s: &str) -> Result<usize, String> {
    let text = s.trim();
    let upper = text.to_ascii_uppercase();
    let unit_start = upper.find(|c: char| c.is_ascii_alphabetic()).unwrap_or(upper.len());
    let (num, unit) = upper.split_at(unit_start);
    let mult: usize = match unit.trim() {
        "" | "B" => 1,
        "K" | "KB" | "KIB" => 1 << 10,
        "M" | "MB" | "MIB" => 1 << 20,
        "G" | "GB" | "GIB" => 1 << 30,
        _ => usize::MAX,
    };
    num.trim()
        .parse::<f64>()
        .ok()
        .filter(|v| *v > 0.0 && v.is_finite() && mult != usize::MAX)
        .map(|v| (v * mult as f64) as usize)
        .ok_or_else(|| format!("--memory-limit {text}: expected a size such as 512M, 4G, 2GB or 1.5GiB"))
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
    if args.paths.first().map(String::as_str) == Some("demo-data") && !std::path::Path::new("demo-data").exists() {
        let dir = args.paths.get(1).map_or("demo-parquet", String::as_str);
        return match ratesheet::demo::write_demo_data(std::path::Path::new(dir)) {
            Ok(()) => {
                eprintln!("wrote the demo data to {dir}");
                ExitCode::SUCCESS
            }
            Err(e) => {
                eprintln!("error: {e}");
                ExitCode::FAILURE
            }
        };
    }
    if args.paths == ["demo"] && !std::path::Path::new("demo").exists() {
        return run_demo(&ctx, args.digits as usize, &Hints::new(!args.no_hints)).await;
    }
    let interactive = args.run.is_none() && args.script.is_none();
    if interactive && args.save_to.is_some() {
        eprintln!("error: --save-to needs statements to run (--run SQL or --script FILE); in the shell use ~export");
        return ExitCode::from(2);
    }
    if interactive && args.draw_to.is_some() {
        eprintln!("error: --draw-to needs statements to run (--run SQL or --script FILE); in the shell use ~draw");
        return ExitCode::from(2);
    }
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
        digits: args.digits as usize,
        max_rows: if interactive { 40 } else { usize::MAX },
        width: ratesheet::cli::output::terminal_width(),
    };
    let text = match (&args.run, &args.script) {
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
            shell.progress &= !args.no_progress;
            shell.hints.set_enabled(!args.no_hints);
            return match shell.run().await {
                Ok(()) => ExitCode::SUCCESS,
                Err(e) => {
                    eprintln!("error: {e}");
                    ExitCode::FAILURE
                }
            };
        }
    };
    let progress = !args.no_progress && std::io::stderr().is_terminal();
    let hints = Hints::new(!args.no_hints);
    let mut last = Vec::new();
    for (k, sql) in statements(&text).iter().enumerate() {
        let result = collect_with_progress(&ctx, sql, progress, &hints).await;
        match result.and_then(|b| render(&b, &style).map(|out| (b, out))) {
            Ok((batches, out)) => {
                print!("{out}");
                last = batches;
            }
            Err(e) => {
                eprintln!(
                    "error in statement {}: {}",
                    k + 1,
                    ratesheet::cli::progress::describe(&e)
                );
                return ExitCode::FAILURE;
            }
        }
    }
    if let Some(path) = &args.save_to {
        match save_anywhere(&ctx, &last, path, args.replace, "add --replace to overwrite it").await {
            Ok(rows) => eprintln!("wrote {rows} rows to {path}"),
            Err(e) => {
                eprintln!("error: {e}");
                return ExitCode::FAILURE;
            }
        }
    }
    if let Some(path) = &args.draw_to {
        let request = ratesheet::cli::picture::Request::default();
        match ratesheet::cli::picture::Picture::of(&last, &request).and_then(|p| p.write(path, args.replace)) {
            Ok(line) => eprintln!("{line}"),
            Err(e) => {
                eprintln!("error: --draw-to {path}: {e}");
                return ExitCode::FAILURE;
            }
        }
    }
    ExitCode::SUCCESS
}

/// Opens the demo tables and runs the narrated demo script.
async fn run_demo(ctx: &datafusion::prelude::SessionContext, digits: usize, hints: &Hints) -> ExitCode {
    let root = std::path::Path::new(env!("CARGO_MANIFEST_DIR"));
    let dir = if std::path::Path::new("demo-parquet").is_dir() {
        std::path::PathBuf::from("demo-parquet")
    } else {
        root.join("demo-parquet")
    };
    let script = root.join("sql-examples/demo.sql");
    for file in ["pipe_breaks.parquet", "callouts.csv"] {
        let path = dir.join(file);
        if let Err(e) = open_table(ctx, &path.to_string_lossy(), None).await {
            eprintln!("error: {e}");
            return ExitCode::FAILURE;
        }
    }
    let text = match std::fs::read_to_string(&script) {
        Ok(t) => t,
        Err(e) => {
            eprintln!("error: {}: {e}", script.display());
            return ExitCode::FAILURE;
        }
    };
    let style = Style {
        format: Format::Table,
        digits,
        max_rows: 30,
        width: ratesheet::cli::output::terminal_width(),
    };
    println!("{}\n", ratesheet::cli::shell::CAUTION);
    for block in text.split("\n\n") {
        let narration: Vec<&str> = block.lines().filter_map(|l| l.strip_prefix("-- ")).collect();
        let sql: String = block
            .lines()
            .filter(|l| !l.starts_with("--"))
            .collect::<Vec<_>>()
            .join("\n");
        if sql.trim().is_empty() {
            continue;
        }
        println!("» {}", narration.join("\n  "));
        println!("  {}\n", sql.trim().replace('\n', "\n  "));
        let mut last = Vec::new();
        for statement in statements(&sql) {
            let progress = std::io::stderr().is_terminal();
            match collect_with_progress(ctx, &statement, progress, hints).await {
                Ok(batches) => match render(&batches, &style) {
                    Ok(out) => {
                        println!("{out}");
                        last = batches;
                    }
                    Err(e) => {
                        eprintln!("error: {}", ratesheet::cli::progress::describe(&e));
                        return ExitCode::FAILURE;
                    }
                },
                Err(e) => {
                    eprintln!("error: {e}");
                    return ExitCode::FAILURE;
                }
            }
        }
        // A line `--> draw ...` asks for a picture of the block's last result.
        for directive in block.lines().filter_map(|l| l.strip_prefix("--> draw")) {
            let words: Vec<String> = directive.split_whitespace().map(str::to_string).collect();
            let glyphs = ratesheet::cli::picture::Glyphs::for_stdout();
            let width = style.width.unwrap_or(100);
            match ratesheet::cli::picture::Request::parse(&words)
                .and_then(|r| ratesheet::cli::picture::Picture::of(&last, &r))
            {
                Ok(p) => println!("{}\n", p.text(width, &glyphs)),
                Err(e) => {
                    eprintln!("error: {e}");
                    return ExitCode::FAILURE;
                }
            }
        }
    }
    println!(
        "To explore the same data yourself: cargo run --release -- {}/pipe_breaks.parquet {}/callouts.csv",
        dir.display(),
        dir.display()
    );
    ExitCode::SUCCESS
}
