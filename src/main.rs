//! The `ratesheet` command: open Parquet/CSV files as tables and run SQL with per-group Poisson
//! fits, interactively or from a query string or script.

use std::process::ExitCode;

use clap::Parser;
use ratesheet::cli::hints::Hints;
use ratesheet::cli::output::{Format, Style, render, save_anywhere, write_rendered};
use ratesheet::cli::progress::collect_with_progress;
use ratesheet::cli::session::{SessionSettings, new_cluster_session, new_session, open_table};
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
    /// Run every statement on the cluster whose scheduler is at HOST:PORT (see 'ratesheet
    /// cluster --help'); tables and settings work as locally.
    #[arg(long, value_name = "HOST:PORT")]
    cluster: Option<String>,
}

/// `ratesheet cluster scheduler|executor`: the processes of a cluster (Apache Ballista).
#[derive(Parser, Debug)]
#[command(
    name = "ratesheet cluster",
    about = "Start the processes of a ratesheet cluster (Apache Ballista); then run 'ratesheet --cluster HOST:PORT FILES...'",
    after_help = "Example on one machine:\n  ratesheet cluster scheduler\n  ratesheet cluster executor --scheduler 127.0.0.1:50050\n  \
                  ratesheet --cluster 127.0.0.1:50050 pipes.parquet\n\n\
                  The cluster speaks plain gRPC without authentication or TLS: keep it on loopback or a private network.\n\
                  Set RATESHEET_LOG=info (or debug) to see the processes' own log lines on stderr."
)]
struct ClusterArgs {
    #[command(subcommand)]
    role: ClusterRole,
}

#[derive(clap::Subcommand, Debug)]
enum ClusterRole {
    /// Plans statements and hands their tasks to executors.
    Scheduler {
        /// Address to listen on.
        #[arg(long, value_name = "ADDR:PORT", default_value = "127.0.0.1:50050")]
        bind: std::net::SocketAddr,
        /// Seconds without a heartbeat after which an executor counts as lost and its tasks run
        /// elsewhere.
        #[arg(long, value_name = "SECONDS", default_value_t = 10, value_parser = clap::value_parser!(u64).range(2..=3600))]
        lost_after: u64,
    },
    /// Runs tasks; joins the scheduler at --scheduler.
    Executor {
        /// The scheduler to join.
        #[arg(long, value_name = "HOST:PORT")]
        scheduler: String,
        /// Host (and data port) to listen on and advertise; free ports are picked when no port is
        /// given, so several executors can run on one machine.
        #[arg(long, value_name = "HOST[:PORT]", default_value = "127.0.0.1")]
        bind: String,
        /// Tasks run at once (default: the number of cores).
        #[arg(long, value_name = "N")]
        slots: Option<usize>,
        /// Folder for shuffle files and spills (default: a new temporary folder).
        #[arg(long, value_name = "DIR")]
        work_dir: Option<std::path::PathBuf>,
        /// Memory for all running tasks together (e.g. 4G); tasks spill beyond their share.
        #[arg(long, value_name = "BYTES")]
        memory_limit: Option<String>,
    },
}

/// `ratesheet cluster ...` (unless a file or folder named `cluster` is meant).
async fn run_cluster_process(words: Vec<String>) -> ExitCode {
    let args = match ClusterArgs::try_parse_from(words) {
        Ok(a) => a,
        Err(e) => {
            let _ = e.print();
            return ExitCode::from(if e.use_stderr() { 2 } else { 0 });
        }
    };
    let result = match args.role {
        ClusterRole::Scheduler { bind, lost_after } => {
            ratesheet::cluster::init_logging("warn");
            ratesheet::cluster::scheduler::run(ratesheet::cluster::scheduler::SchedulerSettings {
                bind,
                lost_after: std::time::Duration::from_secs(lost_after),
            })
            .await
        }
        ClusterRole::Executor {
            scheduler,
            bind,
            slots,
            work_dir,
            memory_limit,
        } => {
            let (host, port) = match ratesheet::cluster::host_and_port(&scheduler, "--scheduler") {
                Ok(a) => a,
                Err(e) => {
                    eprintln!("error: {e}");
                    return ExitCode::from(2);
                }
            };
            let memory_limit = match memory_limit.as_deref().map(parse_bytes).transpose() {
                Ok(m) => m,
                Err(e) => {
                    eprintln!("error: {e}");
                    return ExitCode::from(2);
                }
            };
            let mut settings = ratesheet::cluster::executor::ExecutorSettings::new(host, port);
            match bind
                .rsplit_once(':')
                .filter(|(_, p)| p.chars().all(|c| c.is_ascii_digit()))
            {
                Some((h, p)) => match p.parse::<u16>() {
                    Ok(p) if p > 0 => {
                        settings.bind_host = h.to_string();
                        settings.data_port = Some(p);
                    }
                    _ => {
                        eprintln!("error: --bind {bind}: the port must be a number from 1 to 65535");
                        return ExitCode::from(2);
                    }
                },
                None => settings.bind_host = bind,
            }
            settings.slots = slots;
            settings.work_dir = work_dir;
            settings.memory_limit = memory_limit;
            ratesheet::cluster::init_logging("warn");
            ratesheet::cluster::executor::run(settings).await
        }
    };
    match result {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("error: {}", ratesheet::cli::progress::describe(&e));
            ExitCode::FAILURE
        }
    }
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
    let words: Vec<String> = std::env::args().collect();
    if words.get(1).map(String::as_str) == Some("cluster") && !std::path::Path::new("cluster").exists() {
        let mut rest = vec!["ratesheet cluster".to_string()];
        rest.extend(words.into_iter().skip(2));
        return run_cluster_process(rest).await;
    }
    let args = Args::parse();
    let memory_limit = match args.memory_limit.as_deref().map(parse_bytes).transpose() {
        Ok(m) => m,
        Err(e) => {
            eprintln!("error: {e}");
            return ExitCode::from(2);
        }
    };
    let settings = SessionSettings {
        threads: args.threads,
        memory_limit,
    };
    let session = match &args.cluster {
        Some(address) => {
            if memory_limit.is_some() {
                eprintln!(
                    "error: --memory-limit applies to one machine; on a cluster give each executor its memory (ratesheet cluster executor --memory-limit)"
                );
                return ExitCode::from(2);
            }
            ratesheet::cluster::init_logging("off");
            new_cluster_session(&settings, address).await
        }
        None => new_session(&settings),
    };
    let ctx = match session {
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
        ratesheet::cli::allocator::keep_freed_memory();
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
    if !interactive {
        ratesheet::cli::allocator::keep_freed_memory();
    }
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
    let on_cluster = ratesheet::cluster::client::cluster_of(&ctx).is_some();
    for (k, sql) in statements(&text).iter().enumerate() {
        let run = collect_with_progress(&ctx, sql, progress, &hints);
        // On a cluster, Ctrl-C cancels the statement's job on the scheduler before exiting.
        let result = if on_cluster {
            let finished = tokio::select! {
                r = run => Some(r),
                _ = tokio::signal::ctrl_c() => None,
            };
            match finished {
                Some(r) => r,
                None => {
                    // The statement's future is gone: its job's cancellation is on its way.
                    ratesheet::cluster::client::finish_cancels(std::time::Duration::from_secs(3)).await;
                    eprintln!("cancelled");
                    return ExitCode::from(130);
                }
            }
        } else {
            run.await
        };
        // Straight to stdout, batch by batch (see `write_rendered`).
        let mut stdout = std::io::BufWriter::with_capacity(1 << 16, std::io::stdout().lock());
        let written = result.and_then(|b| {
            write_rendered(&b, &style, &mut stdout)?;
            std::io::Write::flush(&mut stdout)?;
            Ok(b)
        });
        drop(stdout);
        match written {
            Ok(batches) => {
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
