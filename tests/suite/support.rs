//! Shared helpers: fixture loading and tolerance checks.

use std::collections::HashMap;
use std::path::PathBuf;

use serde_json::Value;

pub fn fixture_path(rel: &str) -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("tests/fixtures")
        .join(rel)
}

pub fn load_json(rel: &str) -> Value {
    let text = std::fs::read_to_string(fixture_path(rel)).unwrap_or_else(|e| panic!("{rel}: {e}"));
    serde_json::from_str(&text).unwrap_or_else(|e| panic!("{rel}: {e}"))
}

/// A CSV without quoting (the reference datasets have none), as text columns by header name.
pub struct Table {
    pub columns: HashMap<String, Vec<String>>,
    pub rows: usize,
}

impl Table {
    pub fn load(rel: &str) -> Table {
        let text = std::fs::read_to_string(fixture_path(rel)).unwrap_or_else(|e| panic!("{rel}: {e}"));
        let mut lines = text.lines();
        let header: Vec<String> = lines.next().unwrap().split(',').map(str::to_string).collect();
        let mut columns: HashMap<String, Vec<String>> = header.iter().map(|h| (h.clone(), Vec::new())).collect();
        let mut rows = 0;
        for line in lines.filter(|l| !l.is_empty()) {
            for (h, v) in header.iter().zip(line.split(',')) {
                columns.get_mut(h).unwrap().push(v.to_string());
            }
            rows += 1;
        }
        Table { columns, rows }
    }

    /// A table from JSON records; `rownames` joins the non-response fields with '.' (R's
    /// naming of the cells of a margin table).
    pub fn from_records(records: &Value, response: &str) -> Table {
        let records = records.as_array().unwrap();
        let keys: Vec<String> = records[0].as_object().unwrap().keys().cloned().collect();
        let mut columns: HashMap<String, Vec<String>> = HashMap::new();
        let text = |v: &Value| v.as_str().map_or_else(|| v.to_string(), str::to_string);
        for r in records {
            for k in &keys {
                columns.entry(k.clone()).or_default().push(text(&r[k]));
            }
            let name: Vec<String> = keys.iter().filter(|k| *k != response).map(|k| text(&r[k])).collect();
            columns.entry("rownames".into()).or_default().push(name.join("."));
        }
        Table {
            columns,
            rows: records.len(),
        }
    }

    pub fn text(&self, name: &str) -> &[String] {
        self.columns.get(name).unwrap_or_else(|| panic!("no column {name}"))
    }

    pub fn num(&self, name: &str) -> Vec<f64> {
        self.text(name).iter().map(|v| v.parse::<f64>().unwrap()).collect()
    }

    /// Rows where `column` equals `value`, as a new table.
    pub fn filter(&self, column: &str, value: &str) -> Table {
        let keep: Vec<usize> = (0..self.rows).filter(|&i| self.text(column)[i] == value).collect();
        let columns = self
            .columns
            .iter()
            .map(|(k, v)| (k.clone(), keep.iter().map(|&i| v[i].clone()).collect()))
            .collect();
        Table {
            columns,
            rows: keep.len(),
        }
    }
}

/// |got - want| <= rel·|want| + abs, with a message naming the quantity.
#[track_caller]
pub fn close(what: &str, got: f64, want: f64, rel: f64, abs: f64) {
    let ok = (got - want).abs() <= rel * want.abs() + abs;
    assert!(
        ok,
        "{what}: got {got:e}, want {want:e} (rel diff {:e}, tolerance rel {rel:e} + abs {abs:e})",
        (got - want).abs() / want.abs().max(f64::MIN_POSITIVE)
    );
}

#[track_caller]
pub fn close_opt(what: &str, got: Option<f64>, want: f64, rel: f64, abs: f64) {
    let got = got.unwrap_or_else(|| panic!("{what}: got NULL, want {want:e}"));
    close(what, got, want, rel, abs);
}

pub fn f(v: &Value) -> f64 {
    v.as_f64().unwrap_or_else(|| panic!("not a number: {v}"))
}

/// A small seeded generator (SplitMix64), so the corpus is the same on every run.
pub struct Seeded(pub u64);

impl Seeded {
    pub fn next(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }

    pub fn below(&mut self, n: usize) -> usize {
        (self.next() % n as u64) as usize
    }
}

/// The shell's prompt (`shell::prompt`): the next statement's number and the marker '▸'.
/// rexpect reads the terminal byte by byte as Latin-1, so the marker's UTF-8 bytes E2 96 B8
/// appear as three characters.
pub const PROMPT: &str = "[0-9]+ \u{e2}\u{96}\u{b8} ";

/// The continuation prompt's bar '┆' (UTF-8 E2 94 86) as rexpect sees it.
pub const CONTINUATION: &str = "\u{e2}\u{94}\u{86} ";

/// A progress line (src/cli/progress.rs `progress_text`): "N rows read…", "all N rows read, …"
/// or "reading N of M rows (P%)…"; shown once a statement has run for `QUIET_PERIOD`. Seeing it
/// means the shell has read the statement and is running it, with its Ctrl-C handler in
/// place: tests wait for it instead of sleeping a fixed time. The footer "↳ N rows · X ms" and the
/// echoed statements do not match it.
pub const PROGRESS_LINE: &str = r"(rows read|of [0-9.]+[kMG]? rows \()";
