//! The SQL functions build without the command-line program: with `default-features = false`
//! the dependency tree has DataFusion and the numerical crates, and none of the CLI's. Read from
//! `cargo tree` (no build), so it costs a second, not a second dependency build.

#[test]
fn the_functions_alone_pull_in_no_cli_crate() {
    let cargo = std::env::var("CARGO").unwrap_or_else(|_| "cargo".into());
    let run = |offline: bool| {
        let mut c = std::process::Command::new(&cargo);
        c.current_dir(env!("CARGO_MANIFEST_DIR")).args([
            "tree",
            "-p",
            "ratesheet",
            "--no-default-features",
            "-e",
            "normal",
            "--prefix",
            "none",
        ]);
        if offline {
            c.arg("--offline");
        }
        c.output().unwrap()
    };
    let mut out = run(true);
    if !out.status.success() {
        out = run(false);
    }
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let tree = String::from_utf8_lossy(&out.stdout);
    let crates: Vec<&str> = tree.lines().filter_map(|l| l.split_whitespace().next()).collect();
    assert!(crates.contains(&"datafusion") && crates.contains(&"nalgebra"), "{tree}");
    for cli_crate in [
        "rustyline",
        "clap",
        "calamine",
        "rust_xlsxwriter",
        "terminal_size",
        "mimalloc",
        "rand_distr",
    ] {
        assert!(
            !crates.contains(&cli_crate),
            "{cli_crate} is in the functions-only tree:\n{tree}"
        );
    }
}
