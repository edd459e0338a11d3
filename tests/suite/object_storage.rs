//! Object storage through a real S3-protocol server on loopback (s3s-fs, started by the test in
//! a thread of its own, serving a temporary folder): the program writes an extract to
//! `s3://...` with COPY, opens it by URL and as a prefix, and gives the same fit as from the
//! local file; a wrong secret fails without the secret in the message.

use std::path::{Path, PathBuf};
use std::process::Command;

const KEY: &str = "ratesheet-test-key";
const SECRET: &str = "ratesheet-test-secret-42";

/// Starts the server on an ephemeral loopback port serving `root`; returns the port.
fn start_server(root: &Path) -> u16 {
    let (tx, rx) = std::sync::mpsc::channel();
    let root = root.to_path_buf();
    std::thread::spawn(move || {
        let rt = tokio::runtime::Builder::new_multi_thread()
            .worker_threads(1)
            .enable_all()
            .build()
            .unwrap();
        rt.block_on(async move {
            let fs = s3s_fs::FileSystem::new(&root).unwrap();
            let mut builder = s3s::service::S3ServiceBuilder::new(fs);
            builder.set_auth(s3s::auth::SimpleAuth::from_single(KEY, SECRET));
            let service = builder.build();
            let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
            tx.send(listener.local_addr().unwrap().port()).unwrap();
            let http = hyper_util::server::conn::auto::Builder::new(hyper_util::rt::TokioExecutor::new());
            loop {
                let Ok((socket, _)) = listener.accept().await else {
                    continue;
                };
                let conn = http
                    .serve_connection(hyper_util::rt::TokioIo::new(socket), service.clone())
                    .into_owned();
                tokio::spawn(async move {
                    let _ = conn.await;
                });
            }
        });
    });
    rx.recv().unwrap()
}

fn ratesheet(port: u16, secret: &str, args: &[&str]) -> (i32, String, String) {
    let out = Command::new(env!("CARGO_BIN_EXE_ratesheet"))
        .current_dir(env!("CARGO_MANIFEST_DIR"))
        .env("AWS_ACCESS_KEY_ID", KEY)
        .env("AWS_SECRET_ACCESS_KEY", secret)
        .env("AWS_REGION", "us-east-1")
        .env("AWS_ENDPOINT_URL", format!("http://127.0.0.1:{port}"))
        .env("AWS_ALLOW_HTTP", "true")
        .args(args)
        .output()
        .unwrap();
    (
        out.status.code().unwrap_or(-1),
        String::from_utf8_lossy(&out.stdout).into_owned(),
        String::from_utf8_lossy(&out.stderr).into_owned(),
    )
}

const FIT: &str = "SELECT district, poisson_fit(breaks, km_years, material, install_decade) AS fit \
                   FROM pipe_breaks GROUP BY district ORDER BY district";

#[test]
fn extracts_in_s3_read_and_write_like_local_files() {
    let root: PathBuf = std::env::temp_dir().join(format!("ratesheet-s3-{}", std::process::id()));
    std::fs::create_dir_all(root.join("extracts")).unwrap();
    let port = start_server(&root);

    let (code, _, err) = ratesheet(
        port,
        SECRET,
        &[
            "demo-parquet/pipe_breaks.parquet",
            "--run",
            "COPY (SELECT * FROM pipe_breaks) TO 's3://extracts/network/pipe_breaks.parquet' STORED AS PARQUET",
        ],
    );
    assert_eq!(code, 0, "{err}");
    assert!(
        root.join("extracts/network/pipe_breaks.parquet").is_file(),
        "the object is on the server"
    );

    let local = ratesheet(
        port,
        SECRET,
        &["demo-parquet/pipe_breaks.parquet", "--run", FIT, "--format", "csv"],
    );
    let remote = ratesheet(
        port,
        SECRET,
        &[
            "s3://extracts/network/pipe_breaks.parquet",
            "--run",
            FIT,
            "--format",
            "csv",
        ],
    );
    assert_eq!(remote.0, 0, "{}", remote.2);
    assert_eq!(remote.1, local.1, "the fit from object storage equals the local one");
    assert!(remote.1.lines().count() > 40);

    // A prefix is a table named after its last part; SQL locations work too.
    let (code, out, err) = ratesheet(
        port,
        SECRET,
        &[
            "s3://extracts/network/",
            "--run",
            "SELECT COUNT(*) AS n FROM network; \
             CREATE EXTERNAL TABLE again STORED AS PARQUET LOCATION 's3://extracts/network/pipe_breaks.parquet'; \
             SELECT SUM(breaks) AS b FROM again",
            "--format",
            "csv",
        ],
    );
    assert_eq!(code, 0, "{err}");
    assert!(out.contains("n\n1800\n") && out.contains("b\n11650\n"), "{out}");

    // --save-to writes an object (refusing to overwrite it unasked).
    let save = [
        "demo-parquet/pipe_breaks.parquet",
        "--run",
        FIT,
        "--format",
        "csv",
        "--save-to",
        "s3://extracts/out/fits.csv",
    ];
    let (code, _, err) = ratesheet(port, SECRET, &save);
    assert_eq!(code, 0, "{err}");
    let saved = std::fs::read_to_string(root.join("extracts/out/fits.csv")).unwrap();
    assert!(saved.starts_with("district,fit_status,"), "{saved}");
    // 10 districts x 6 terms, one row each, as the message says.
    assert_eq!(saved.lines().count(), 1 + 10 * 6);
    assert!(err.contains("wrote 60 rows to s3://extracts/out/fits.csv"), "{err}");
    let (code, _, err) = ratesheet(port, SECRET, &save);
    assert!(code != 0 && err.contains("exists; add --replace"), "{err}");

    // A wrong secret: an error, and the secret is never shown.
    let (code, _, err) = ratesheet(
        port,
        "not-the-secret-7731",
        &["s3://extracts/network/pipe_breaks.parquet", "--run", "SELECT 1"],
    );
    assert_ne!(code, 0);
    assert!(
        err.starts_with("error") && err.contains("s3://extracts/network/pipe_breaks.parquet"),
        "{err}"
    );
    assert!(!err.contains("not-the-secret-7731") && !err.contains(SECRET), "{err}");
    std::fs::remove_dir_all(&root).ok();
}

/// A cluster of real processes reads and writes the same server: each process has the AWS
/// variables in its own environment (they never travel), the executors read the objects and
/// write COPY's output themselves.
#[test]
fn a_cluster_reads_and_writes_s3_with_each_process_s_own_environment() {
    use crate::cluster::processes::{await_line, client_with, free_port, start_with};
    use std::time::Duration;

    let root: PathBuf = std::env::temp_dir().join(format!("ratesheet-s3-cluster-{}", std::process::id()));
    std::fs::create_dir_all(root.join("extracts/network")).unwrap();
    std::fs::copy(
        Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-parquet/pipe_breaks.parquet"),
        root.join("extracts/network/pipe_breaks.parquet"),
    )
    .unwrap();
    let port = start_server(&root);
    let env = [
        ("AWS_ACCESS_KEY_ID", KEY.to_string()),
        ("AWS_SECRET_ACCESS_KEY", SECRET.to_string()),
        ("AWS_REGION", "us-east-1".to_string()),
        ("AWS_ENDPOINT_URL", format!("http://127.0.0.1:{port}")),
        ("AWS_ALLOW_HTTP", "true".to_string()),
    ];
    let address = format!("127.0.0.1:{}", free_port());
    let scheduler = start_with(&["cluster", "scheduler", "--bind", &address], "warn", &env);
    assert!(await_line(
        &scheduler,
        "scheduler listening on",
        Duration::from_secs(30)
    ));
    let _executors: Vec<_> = (0..2)
        .map(|_| {
            let e = start_with(
                &["cluster", "executor", "--scheduler", &address, "--slots", "1"],
                "warn",
                &env,
            );
            assert!(await_line(&e, "executor joining", Duration::from_secs(30)));
            e
        })
        .collect();
    let limit = Duration::from_secs(90);
    let local = client_with(
        &["demo-parquet/pipe_breaks.parquet", "--run", FIT, "--format", "csv"],
        limit,
        &[],
    );
    let url = "s3://extracts/network/pipe_breaks.parquet";
    let remote = client_with(
        &["--cluster", &address, url, "--run", FIT, "--format", "csv"],
        limit,
        &env,
    );
    assert_eq!(remote.0, Some(0), "{}", remote.2);
    assert_eq!(
        remote.1, local.1,
        "the cluster's fit from object storage equals the local one"
    );

    // COPY on the cluster writes the object (an executor does); reading it back gives the rows.
    let copy = format!("COPY ({FIT}) TO 's3://extracts/out/fits.parquet' STORED AS PARQUET");
    let wrote = client_with(&["--cluster", &address, url, "--run", &copy], limit, &env);
    assert_eq!(wrote.0, Some(0), "{}", wrote.2);
    let back = client_with(
        &[
            "--cluster",
            &address,
            "s3://extracts/out/fits.parquet",
            "--run",
            "SELECT COUNT(*) AS n FROM fits",
            "--format",
            "csv",
        ],
        limit,
        &env,
    );
    assert_eq!(back.0, Some(0), "{}", back.2);
    assert_eq!(
        back.1, "n\n10\n",
        "one fit per district, read back by URL as table 'fits'"
    );
    let _ = std::fs::remove_dir_all(&root);
}
