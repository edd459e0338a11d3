//! Which columns of a result a picture reads: found by shape, or named by the user.
//!
//! Forest plots read a label, an estimate and an interval per row, from (in this order of
//! preference) a fit column (its terms, intercept left out, with the fit's level), a struct
//! with `term`/`rate_ratio`/`rr_low`/`rr_high` fields (an unnested term), flat columns of those
//! names, or `ratio`/`low`/`high` as columns or a struct (`standardized_rate_ratio`,
//! `rate_ratio_test`). Funnel plots
//! read observed and expected counts from a `standardized_ratio` struct or flat columns named
//! `observed` and `expected`. The label is the row's text columns joined with " · ".

use datafusion::arrow::array::{Array, ArrayRef, AsArray, RecordBatch, StructArray};
use datafusion::arrow::compute::cast;
use datafusion::arrow::datatypes::{DataType, Float64Type};

use crate::sql::model::fields::{FitField, FitReader, TermField};

/// One row of a forest plot.
#[derive(Debug, Clone, PartialEq)]
pub struct ForestRow {
    pub label: String,
    pub estimate: Option<f64>,
    pub low: Option<f64>,
    pub high: Option<f64>,
    /// Why there is no estimate or no limit (a term's flag), shown as text.
    pub note: Option<String>,
}

/// One area of a funnel plot.
#[derive(Debug, Clone, PartialEq)]
pub struct FunnelPoint {
    pub label: String,
    pub observed: f64,
    pub expected: f64,
}

/// The rows of a forest plot and the level their intervals were computed at, if the result
/// says.
#[derive(Debug, Clone, PartialEq)]
pub struct ForestData {
    pub rows: Vec<ForestRow>,
    pub level: Option<f64>,
}

/// Column names given by the user: label, then the numbers (estimate, low, high for a forest
/// plot; observed, expected for a funnel plot).
#[derive(Debug, Clone, Default)]
pub struct Named {
    pub label: Option<String>,
    pub numbers: Vec<String>,
}

fn floats(a: &ArrayRef) -> Option<Vec<Option<f64>>> {
    let a = cast(a, &DataType::Float64).ok()?;
    let a = a.as_primitive::<Float64Type>();
    Some((0..a.len()).map(|i| (!a.is_null(i)).then(|| a.value(i))).collect())
}

fn texts(a: &ArrayRef) -> Vec<Option<String>> {
    match cast(a, &DataType::Utf8) {
        Ok(t) => {
            let t = t.as_string::<i32>();
            (0..t.len())
                .map(|i| (!t.is_null(i)).then(|| t.value(i).to_string()))
                .collect()
        }
        Err(_) => vec![None; a.len()],
    }
}

fn is_text(t: &DataType) -> bool {
    matches!(
        t,
        DataType::Utf8 | DataType::LargeUtf8 | DataType::Utf8View | DataType::Dictionary(_, _)
    )
}

/// The label of each row: its text columns (those not in `skip`) joined with " · ".
fn labels(b: &RecordBatch, skip: &[usize], named: Option<&str>) -> Vec<String> {
    let columns: Vec<usize> = match named {
        Some(n) => b.schema().index_of(n).into_iter().collect(),
        None => (0..b.num_columns())
            .filter(|c| !skip.contains(c) && is_text(b.schema().field(*c).data_type()))
            .collect(),
    };
    let values: Vec<Vec<Option<String>>> = columns.iter().map(|&c| texts(b.column(c))).collect();
    (0..b.num_rows())
        .map(|r| {
            values
                .iter()
                .filter_map(|v| v[r].clone())
                .collect::<Vec<_>>()
                .join(" · ")
        })
        .collect()
}

fn join(a: &str, b: &str) -> String {
    match (a.is_empty(), b.is_empty()) {
        (true, _) => b.to_string(),
        (_, true) => a.to_string(),
        _ => format!("{a} · {b}"),
    }
}

fn struct_field(s: &StructArray, name: &str) -> Option<ArrayRef> {
    s.column_by_name(name).cloned()
}

/// The forest plot's rows of a result.
pub fn forest_rows(batches: &[RecordBatch], named: &Named) -> Result<ForestData, String> {
    let mut rows = Vec::new();
    let mut level = None;
    for b in batches {
        let schema = b.schema();
        if !named.numbers.is_empty() {
            let [e, l, h] = named.numbers.as_slice() else {
                return Err("name the columns as LABEL ESTIMATE LOW HIGH".into());
            };
            let column = |n: &str| {
                schema
                    .index_of(n)
                    .map_err(|_| format!("the result has no column {n}"))
                    .and_then(|i| floats(b.column(i)).ok_or_else(|| format!("column {n} is not numeric")))
            };
            let (e, l, h) = (column(e)?, column(l)?, column(h)?);
            let labels = labels(b, &[], named.label.as_deref());
            for r in 0..b.num_rows() {
                rows.push(ForestRow {
                    label: labels[r].clone(),
                    estimate: e[r],
                    low: l[r],
                    high: h[r],
                    note: None,
                });
            }
            continue;
        }
        // A fit column: its terms, with the fit's level.
        let fit = (0..b.num_columns()).find_map(|c| {
            let s = b.column(c).as_struct_opt()?;
            FitReader::of(s).map(|reader| (c, reader))
        });
        if let Some((c, fit)) = fit {
            let labels = labels(b, &[c], None);
            for r in 0..b.num_rows() {
                if fit.is_null(r) {
                    continue;
                }
                level = level.or(fit.float(FitField::Level, r));
                for i in fit.term_range(r) {
                    let term = fit.term_text(TermField::Term, i).unwrap_or("");
                    if term == "intercept" {
                        continue;
                    }
                    rows.push(ForestRow {
                        label: join(&labels[r], term),
                        estimate: fit.term_float(TermField::RateRatio, i),
                        low: fit.term_float(TermField::RrLow, i),
                        high: fit.term_float(TermField::RrHigh, i),
                        note: fit.term_text(TermField::Flag, i).map(str::to_string),
                    });
                }
            }
            continue;
        }
        // A term struct (unnested terms) or flat columns.
        let term_struct = (0..b.num_columns()).find(|&c| {
            b.column(c).as_struct_opt().is_some_and(|s| {
                ["term", "rate_ratio", "rr_low", "rr_high"]
                    .iter()
                    .all(|f| s.column_by_name(f).is_some())
            })
        });
        let ratio_struct = (0..b.num_columns()).find(|&c| {
            b.column(c)
                .as_struct_opt()
                .is_some_and(|s| ["ratio", "low", "high"].iter().all(|f| s.column_by_name(f).is_some()))
        });
        let flat = |names: [&str; 3]| -> Option<[usize; 3]> {
            let idx: Vec<usize> = names.iter().filter_map(|n| schema.index_of(n).ok()).collect();
            <[usize; 3]>::try_from(idx).ok()
        };
        let (skip, term, e, l, h, note): (Vec<usize>, Option<Vec<Option<String>>>, _, _, _, _) =
            if let Some(c) = term_struct {
                let s = b.column(c).as_struct();
                let get = |n: &str| struct_field(s, n).and_then(|a| floats(&a)).unwrap_or_default();
                (
                    vec![c],
                    struct_field(s, "term").map(|a| texts(&a)),
                    get("rate_ratio"),
                    get("rr_low"),
                    get("rr_high"),
                    struct_field(s, "flag").map(|a| texts(&a)),
                )
            } else if let Some([e, l, h]) = flat(["rate_ratio", "rr_low", "rr_high"]) {
                let term = schema.index_of("term").ok();
                let flag = schema.index_of("flag").ok();
                (
                    [Some(e), Some(l), Some(h), term, flag].into_iter().flatten().collect(),
                    term.map(|t| texts(b.column(t))),
                    floats(b.column(e)).unwrap_or_default(),
                    floats(b.column(l)).unwrap_or_default(),
                    floats(b.column(h)).unwrap_or_default(),
                    flag.map(|f| texts(b.column(f))),
                )
            } else if let Some([e, l, h]) = flat(["ratio", "low", "high"]) {
                (
                    vec![e, l, h],
                    None,
                    floats(b.column(e)).unwrap_or_default(),
                    floats(b.column(l)).unwrap_or_default(),
                    floats(b.column(h)).unwrap_or_default(),
                    None,
                )
            } else if let Some(c) = ratio_struct {
                let s = b.column(c).as_struct();
                let get = |n: &str| struct_field(s, n).and_then(|a| floats(&a)).unwrap_or_default();
                (
                    vec![c],
                    None,
                    get("ratio"),
                    get("low"),
                    get("high"),
                    struct_field(s, "status").map(|a| texts(&a)),
                )
            } else {
                return Err(
                    "the result has no estimate to draw: expected a fit column, an unnested term (term, rate_ratio, \
                 rr_low, rr_high), or a ratio with low and high; or name the columns: forest LABEL ESTIMATE LOW HIGH"
                        .into(),
                );
            };
        if let Ok(i) = schema.index_of("level") {
            level = level.or(floats(b.column(i)).and_then(|v| v.into_iter().flatten().next()));
        }
        let labels = labels(b, &skip, None);
        for r in 0..b.num_rows() {
            let term = term.as_ref().and_then(|t| t[r].clone()).unwrap_or_default();
            if term == "intercept" {
                continue;
            }
            let note = note.as_ref().and_then(|n| n[r].clone()).filter(|n| n != "ok");
            rows.push(ForestRow {
                label: join(&labels[r], &term),
                estimate: e.get(r).copied().flatten(),
                low: l.get(r).copied().flatten(),
                high: h.get(r).copied().flatten(),
                note,
            });
        }
    }
    if rows.is_empty() {
        return Err("the result has no rows to draw".into());
    }
    if rows.iter().all(|r| r.low.is_none() && r.high.is_none()) {
        return Err("every interval in the result is NULL: there is nothing to draw".into());
    }
    if let Some(bad) = rows.iter().find(|r| match (r.estimate, r.low, r.high) {
        (_, Some(l), Some(h)) if l > h => true,
        (Some(e), Some(l), _) if e < l => true,
        (Some(e), _, Some(h)) if e > h => true,
        _ => false,
    }) {
        return Err(format!(
            "row '{}' has an interval that does not hold its estimate (low {:?}, estimate {:?}, high {:?}); \
             check which columns are the estimate and the limits",
            bad.label, bad.low, bad.estimate, bad.high
        ));
    }
    if let Some(bad) = rows
        .iter()
        .find(|r| [r.estimate, r.low, r.high].iter().flatten().any(|v| *v <= 0.0))
    {
        return Err(format!(
            "row '{}' has a value <= 0, which a log axis cannot show (ratios are > 0)",
            bad.label
        ));
    }
    Ok(ForestData { rows, level })
}

/// The funnel plot's areas of a result.
pub fn funnel_points(batches: &[RecordBatch], named: &Named) -> Result<Vec<FunnelPoint>, String> {
    let mut points = Vec::new();
    for b in batches {
        let schema = b.schema();
        let (skip, o, e) = if !named.numbers.is_empty() {
            let [o, e] = named.numbers.as_slice() else {
                return Err("name the columns as LABEL OBSERVED EXPECTED".into());
            };
            let column = |n: &str| {
                schema
                    .index_of(n)
                    .map_err(|_| format!("the result has no column {n}"))
                    .and_then(|i| {
                        floats(b.column(i))
                            .map(|v| (i, v))
                            .ok_or_else(|| format!("column {n} is not numeric"))
                    })
            };
            let ((oi, o), (ei, e)) = (column(o)?, column(e)?);
            (vec![oi, ei], o, e)
        } else if let Some(c) = (0..b.num_columns()).find(|&c| {
            b.column(c)
                .as_struct_opt()
                .is_some_and(|s| s.column_by_name("observed").is_some() && s.column_by_name("expected").is_some())
        }) {
            let s = b.column(c).as_struct();
            let get = |n: &str| struct_field(s, n).and_then(|a| floats(&a)).unwrap_or_default();
            (vec![c], get("observed"), get("expected"))
        } else if let (Ok(oi), Ok(ei)) = (schema.index_of("observed"), schema.index_of("expected")) {
            let get = |i: usize| floats(b.column(i)).unwrap_or_default();
            (vec![oi, ei], get(oi), get(ei))
        } else {
            return Err(
                "the result has no observed and expected counts: expected a standardized_ratio(...) column or columns \
                 named observed and expected; or name them: funnel LABEL OBSERVED EXPECTED"
                    .into(),
            );
        };
        let labels = labels(b, &skip, named.label.as_deref());
        for r in 0..b.num_rows() {
            if let (Some(o), Some(e)) = (o.get(r).copied().flatten(), e.get(r).copied().flatten()) {
                if !(e > 0.0 && o >= 0.0 && o.is_finite() && e.is_finite()) {
                    return Err(format!(
                        "area '{}' has observed {o} and expected {e}: a funnel plot needs observed >= 0 and expected > 0",
                        labels[r]
                    ));
                }
                points.push(FunnelPoint {
                    label: labels[r].clone(),
                    observed: o,
                    expected: e,
                });
            }
        }
    }
    if points.is_empty() {
        return Err("the result has no area with both observed and expected counts".into());
    }
    Ok(points)
}
