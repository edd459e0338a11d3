//! Rendering of result batches: an aligned text table (our own layout), CSV, JSON lines and
//! Markdown.
//!
//! Text layout (our "ledger"): a header, one heavy rule across the table, rows grouped by five
//! with a light dotted rule between groups; numbers right-aligned
//! with a chosen number of significant digits and lined up on the decimal point, p-values in
//! three significant digits however small, NULL as `∅`, struct columns spread into one column
//! per field, headers without the engine's qualifiers where unambiguous,
//! a fit struct summarised in one cell (status, rows, deviance, dispersion, number of terms).

use crate::sql::model::fields::{FitField, FitReader, RecordTable, TermField};
use datafusion::arrow::array::{Array, ArrayRef, AsArray, RecordBatch, StructArray};
use datafusion::arrow::datatypes::{DataType, Float64Type};
use datafusion::arrow::util::display::{ArrayFormatter, FormatOptions};
use datafusion::error::Result;

/// Output formats.
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum Format {
    Table,
    Csv,
    Json,
    Markdown,
}

/// Rendering choices.
#[derive(Debug, Clone, Copy)]
pub struct Style {
    pub format: Format,
    pub digits: usize,
    /// Rows shown in table and Markdown output before the rest is summarised.
    pub max_rows: usize,
    /// Width to fold text tables into (the terminal's); None leaves them as wide as they are.
    pub width: Option<usize>,
}

/// The width of the terminal on stdout, if stdout is one.
pub fn terminal_width() -> Option<usize> {
    terminal_size::terminal_size()
        .map(|(w, _)| w.0 as usize)
        .filter(|&w| w >= 20)
}

const NULL_MARK: &str = "∅";

/// Renders batches to a string.
pub fn render(batches: &[RecordBatch], style: &Style) -> Result<String> {
    let mut out = Vec::new();
    write_rendered(batches, style, &mut out)?;
    Ok(String::from_utf8(out).unwrap_or_else(|e| String::from_utf8_lossy(e.as_bytes()).into_owned()))
}

/// Writes `batches` as [`render`] formats them, straight to `out`: CSV and JSON batch by batch,
/// without building the whole text first (a large result written to a pipe then never sits in
/// memory twice; growing one big buffer was a third of a whole run's time on 100,000 groups).
pub fn write_rendered(batches: &[RecordBatch], style: &Style, out: &mut dyn std::io::Write) -> Result<()> {
    match style.format {
        Format::Csv => {
            let flat = super::flat::flatten_all(batches)?;
            let mut w = datafusion::arrow::csv::WriterBuilder::new()
                .with_header(true)
                .build(out);
            for b in flat {
                w.write(&b)?;
            }
        }
        Format::Json => {
            let mut w = datafusion::arrow::json::WriterBuilder::new()
                .with_explicit_nulls(true)
                .build::<_, datafusion::arrow::json::writer::LineDelimited>(out);
            for b in batches {
                w.write(b)?;
            }
            w.finish()?;
        }
        Format::Table | Format::Markdown => out.write_all(text_table(batches, style)?.as_bytes())?,
    }
    Ok(())
}

fn is_p_value(name: &str) -> bool {
    let n = name.to_ascii_lowercase();
    let n = n.trim_end_matches(']');
    n.ends_with("p_value") || n.ends_with("_p") || n == "p"
}

/// A number with `digits` significant digits; scientific notation for very large or small.
pub fn format_number(v: f64, digits: usize) -> String {
    if v == 0.0 {
        return "0".into();
    }
    if !v.is_finite() {
        return v.to_string();
    }
    let digits = digits.clamp(1, 17);
    let a = v.abs();
    if (1e-4..1e12).contains(&a) {
        let decimals = (digits as i32 - 1 - a.log10().floor() as i32).max(0) as usize;
        let s = format!("{v:.decimals$}");
        if s.contains('.') {
            s.trim_end_matches('0').trim_end_matches('.').to_string()
        } else {
            s
        }
    } else {
        let s = format!("{v:.prec$e}", prec = digits - 1);
        match s.split_once('e') {
            Some((m, e)) if m.contains('.') => format!("{}e{e}", m.trim_end_matches('0').trim_end_matches('.')),
            _ => s,
        }
    }
}

/// A p-value in 3 significant digits, however small (the tails are computed directly, so
/// small values keep their digits; scientific notation below 1e-4).
pub fn format_p(v: f64) -> String {
    format_number(v, 3)
}

fn is_fit(s: &StructArray) -> bool {
    FitReader::of(s).is_some()
}

/// One-cell summary of a fit struct.
fn fit_summary(s: &StructArray, r: usize, digits: usize) -> String {
    let Some(fit) = FitReader::of(s) else {
        return NULL_MARK.into();
    };
    let float = |f: FitField| {
        fit.float(f, r)
            .map_or_else(|| NULL_MARK.into(), |v| format_number(v, digits))
    };
    format!(
        "[{}] rows {} · deviance {} · dispersion {} · {} terms",
        fit.text(FitField::Status, r).unwrap_or_default(),
        fit.uint(FitField::NUsed, r)
            .map_or_else(|| NULL_MARK.into(), |n| n.to_string()),
        float(FitField::Deviance),
        float(FitField::Dispersion),
        fit.term_range(r).len()
    )
}

fn cell(col: &ArrayRef, fmt: &ArrayFormatter<'_>, name: &str, r: usize, digits: usize) -> (String, bool) {
    if col.is_null(r) {
        return (NULL_MARK.into(), col.data_type().is_numeric());
    }
    match col.data_type() {
        DataType::Float64 => {
            let v = col.as_primitive::<Float64Type>().value(r);
            (
                if is_p_value(name) {
                    format_p(v)
                } else {
                    format_number(v, digits)
                },
                true,
            )
        }
        DataType::Float32 | DataType::Decimal128(_, _) | DataType::Decimal256(_, _) => {
            match datafusion::arrow::compute::cast(&col.slice(r, 1), &DataType::Float64) {
                Ok(v) => (format_number(v.as_primitive::<Float64Type>().value(0), digits), true),
                Err(_) => (fmt.value(r).to_string(), true),
            }
        }
        t if t.is_integer() => (fmt.value(r).to_string(), true),
        DataType::Struct(_) if is_fit(col.as_struct()) => (fit_summary(col.as_struct(), r, digits), false),
        _ => (fmt.value(r).to_string(), false),
    }
}

/// Column headers without the qualifiers the engine adds (`fit[dispersion]` -> `dispersion`,
/// `t.t[term]` -> `term`, `r.low` -> `low`), each only where the short name is unique.
fn short_headers(names: &[String]) -> Vec<String> {
    // Only field accesses (`x[field]`) and plain qualified names (`t.x`, `r.low`) are
    // shortened; an expression such as `t.a + t.b` keeps its text.
    let short = |n: &str| -> String {
        if let Some(inner) = n.strip_suffix(']') {
            if let Some(i) = inner.rfind('[') {
                return inner[i + 1..].to_string();
            }
        }
        let plain = n.chars().all(|c| c.is_alphanumeric() || c == '_' || c == '.');
        if plain {
            n.rsplit('.').next().unwrap_or(n).to_string()
        } else {
            n.to_string()
        }
    };
    let shorts: Vec<String> = names.iter().map(|n| short(n)).collect();
    names
        .iter()
        .zip(&shorts)
        .map(|(n, s)| {
            let unique = shorts.iter().filter(|o| *o == s).count() == 1 && !s.is_empty();
            if unique { s.clone() } else { n.clone() }
        })
        .collect()
}

/// Numbers of one column lined up on their decimal point (integers end where the points are);
/// each keeps its own significant digits.
fn align_decimals(rows: &mut [Vec<(String, bool)>], column: usize) {
    let split = |s: &str| -> (usize, usize) {
        match s.find('.') {
            Some(i) => (text_width(&s[..i]), text_width(&s[i..])),
            None => (text_width(s), 0),
        }
    };
    let is_number = |s: &str| s.starts_with(|c: char| c.is_ascii_digit() || c == '-');
    let (mut int_w, mut frac_w) = (0, 0);
    for r in rows.iter() {
        let (s, num) = &r[column];
        if *num && is_number(s) {
            let (i, f) = split(s);
            int_w = int_w.max(i);
            frac_w = frac_w.max(f);
        }
    }
    for r in rows.iter_mut() {
        let (s, num) = &mut r[column];
        if *num && is_number(s) {
            let (i, f) = split(s);
            *s = format!("{}{s}{}", " ".repeat(int_w - i), " ".repeat(frac_w - f));
        }
    }
}

fn text_table(batches: &[RecordBatch], style: &Style) -> Result<String> {
    let batches: Vec<RecordBatch> = batches
        .iter()
        .map(super::flat::spread_for_display)
        .collect::<std::result::Result<_, _>>()?;
    let batches = &batches[..];
    let Some(first) = batches.first() else {
        return Ok(String::new());
    };
    let schema = first.schema();
    let full_names: Vec<String> = schema.fields().iter().map(|f| f.name().clone()).collect();
    let names = short_headers(&full_names);
    let options = FormatOptions::default().with_null(NULL_MARK);
    let total: usize = batches.iter().map(RecordBatch::num_rows).sum();
    let mut rows: Vec<Vec<(String, bool)>> = Vec::new();
    'outer: for b in batches {
        let fmts = formatters(b, &options)?;
        for r in 0..b.num_rows() {
            if rows.len() == style.max_rows {
                break 'outer;
            }
            rows.push(
                b.columns()
                    .iter()
                    .zip(&fmts)
                    .zip(&full_names)
                    .map(|((c, f), n)| cell(c, f, n, r, style.digits))
                    .collect(),
            );
        }
    }
    for j in 0..names.len() {
        align_decimals(&mut rows, j);
    }
    let markdown = style.format == Format::Markdown;
    // Plan text (EXPLAIN) is never shortened or folded: every line of it matters.
    let plan = full_names.iter().any(|n| n == "plan_type") && full_names.iter().any(|n| n == "plan");
    let fold = style.width.filter(|_| !markdown && !plan);
    if let Some(w) = fold {
        shorten_text_cells(&mut rows, (w / 2).max(24));
    }
    let widths: Vec<usize> = (0..names.len())
        .map(|j| {
            rows.iter()
                .map(|r| text_width(&r[j].0))
                .chain([text_width(&names[j])])
                .max()
                .unwrap_or(1)
        })
        .collect();
    let blocks = match fold {
        Some(w) => column_blocks(&widths, w),
        None => vec![(0..names.len()).collect()],
    };
    let mut out = String::new();
    let line = |cells: Vec<String>| -> String {
        if markdown {
            format!("| {} |\n", cells.join(" | "))
        } else {
            format!("{}\n", cells.join("  ").trim_end())
        }
    };
    for (k, block) in blocks.iter().enumerate() {
        if blocks.len() > 1 {
            let gap = if k > 0 { "\n" } else { "" };
            out.push_str(&format!(
                "{gap}(part {} of {}, folded to the terminal width)\n",
                k + 1,
                blocks.len()
            ));
        }
        out.push_str(&line(block.iter().map(|&j| pad_right(&names[j], widths[j])).collect()));
        // Markdown: the standard delimiter row. Text: one heavy rule across the whole table,
        // and a light dotted rule after every fifth row, as a ledger groups its lines.
        let table_width: usize = block.iter().map(|&j| widths[j]).sum::<usize>() + 2 * block.len().saturating_sub(1);
        if markdown {
            out.push_str(&line(block.iter().map(|&j| "-".repeat(widths[j])).collect()));
        } else {
            out.push_str(&format!("{}\n", "━".repeat(table_width)));
        }
        for (k, r) in rows.iter().enumerate() {
            if !markdown && k > 0 && k % 5 == 0 {
                out.push_str(&format!("{}\n", "┈".repeat(table_width)));
            }
            out.push_str(&line(
                block
                    .iter()
                    .map(|&j| {
                        let (s, num) = &r[j];
                        if *num {
                            pad_left(s, widths[j])
                        } else {
                            pad_right(s, widths[j])
                        }
                    })
                    .collect(),
            ));
        }
    }
    if total > rows.len() {
        out.push_str(&format!("… {} more rows not shown\n", total - rows.len()));
    }
    if style.format == Format::Table && total <= CARD_ROWS {
        out.push_str(&fit_cards(batches, style)?);
    }
    Ok(out)
}

fn text_width(s: &str) -> usize {
    s.chars().count()
}

fn pad_right(s: &str, w: usize) -> String {
    format!("{s}{}", " ".repeat(w.saturating_sub(text_width(s))))
}

fn pad_left(s: &str, w: usize) -> String {
    format!("{}{s}", " ".repeat(w.saturating_sub(text_width(s))))
}

/// Text cells longer than `limit` characters end in '…' (numbers are never cut).
fn shorten_text_cells(rows: &mut [Vec<(String, bool)>], limit: usize) {
    for cell in rows.iter_mut().flatten() {
        if !cell.1 && text_width(&cell.0) > limit {
            let kept: String = cell.0.chars().take(limit - 1).collect();
            cell.0 = format!("{kept}…");
        }
    }
}

/// Splits columns into blocks that fit `width` (columns separated by two spaces). Every block
/// after the first starts again with column 0, the row label, so rows can be matched up.
fn column_blocks(widths: &[usize], width: usize) -> Vec<Vec<usize>> {
    let mut blocks: Vec<Vec<usize>> = Vec::new();
    let mut block = vec![0];
    let mut used = widths.first().copied().unwrap_or(0);
    for (j, &w) in widths.iter().enumerate().skip(1) {
        if used + 2 + w > width && block.len() > 1 {
            blocks.push(std::mem::replace(&mut block, vec![0, j]));
            used = widths[0] + 2 + w;
        } else {
            block.push(j);
            used += 2 + w;
        }
    }
    blocks.push(block);
    blocks
}

/// One display formatter per column of `b`.
fn formatters<'a>(b: &'a RecordBatch, options: &'a FormatOptions<'a>) -> Result<Vec<ArrayFormatter<'a>>> {
    Ok(b.columns()
        .iter()
        .map(|c| ArrayFormatter::try_new(c.as_ref(), options))
        .collect::<std::result::Result<_, _>>()?)
}

/// Results with at most this many rows get a term table under the main table for each fit.
const CARD_ROWS: usize = 12;

/// Term fields shown in a card, in order.
const CARD_FIELDS: &[TermField] = &[
    TermField::Term,
    TermField::Estimate,
    TermField::StdError,
    TermField::Z,
    TermField::PValue,
    TermField::RateRatio,
    TermField::RrLow,
    TermField::RrHigh,
    TermField::Flag,
];

/// For each fit cell: a heading naming the row (its other columns) and the fit's term table.
/// One line per fit in `batches` (for `~fits`): the row's label, status, rows used,
/// dispersion, overdispersion p-value and the terms that carry a flag. `None` without fits.
pub fn fit_overview(batches: &[RecordBatch], digits: usize) -> Option<String> {
    let mut out = String::new();
    let options = FormatOptions::default().with_null(NULL_MARK);
    for b in batches {
        let fits: Vec<usize> = (0..b.num_columns())
            .filter(|&j| b.column(j).as_struct_opt().is_some_and(is_fit))
            .collect();
        let fmts = formatters(b, &options).ok()?;
        let schema = b.schema();
        for r in 0..b.num_rows() {
            let label: Vec<String> = (0..b.num_columns())
                .filter(|j| {
                    !fits.contains(j) && !matches!(b.column(*j).data_type(), DataType::Struct(_) | DataType::List(_))
                })
                .map(|j| format!("{}={}", schema.field(j).name(), fmts[j].value(r)))
                .collect();
            for &j in &fits {
                let reader = FitReader::of(b.column(j).as_struct())?;
                if reader.is_null(r) {
                    continue;
                }
                let number = |f: FitField| {
                    reader
                        .float(f, r)
                        .map_or_else(|| NULL_MARK.to_string(), |v| format_number(v, digits))
                };
                let flagged: Vec<String> = reader
                    .term_range(r)
                    .filter_map(|i| {
                        let flag = reader.term_text(TermField::Flag, i)?;
                        Some(format!(
                            "{} ({flag})",
                            reader.term_text(TermField::Term, i).unwrap_or("?")
                        ))
                    })
                    .collect();
                out.push_str(&format!(
                    "{}{}: {} · {} rows · dispersion {} · overdispersion p {}{}\n",
                    label.join(", "),
                    if fits.len() > 1 {
                        format!(" {}", schema.field(j).name())
                    } else {
                        String::new()
                    },
                    reader.text(FitField::Status, r).unwrap_or_default(),
                    reader
                        .uint(FitField::NUsed, r)
                        .map_or_else(|| NULL_MARK.into(), |n| n.to_string()),
                    number(FitField::Dispersion),
                    reader
                        .float(FitField::OverdispersionP, r)
                        .map_or_else(|| NULL_MARK.to_string(), format_p),
                    if flagged.is_empty() {
                        String::new()
                    } else {
                        format!(" · flagged: {}", flagged.join(", "))
                    }
                ));
            }
        }
    }
    (!out.is_empty()).then_some(out)
}

fn fit_cards(batches: &[RecordBatch], style: &Style) -> Result<String> {
    let mut out = String::new();
    let options = FormatOptions::default().with_null(NULL_MARK);
    for b in batches {
        let schema = b.schema();
        let fit_columns: Vec<usize> = (0..b.num_columns())
            .filter(|&j| matches!(b.column(j).data_type(), DataType::Struct(_)) && is_fit(b.column(j).as_struct()))
            .collect();
        if fit_columns.is_empty() {
            continue;
        }
        let fmts = formatters(b, &options)?;
        for r in 0..b.num_rows() {
            let label: Vec<String> = (0..b.num_columns())
                .filter(|j| {
                    !fit_columns.contains(j)
                        && !matches!(b.column(*j).data_type(), DataType::Struct(_) | DataType::List(_))
                })
                .map(|j| format!("{}={}", schema.field(j).name(), fmts[j].value(r)))
                .collect();
            for &j in &fit_columns {
                let fit = b.column(j).as_struct();
                if fit.is_null(r) {
                    continue;
                }
                let heading = if label.is_empty() {
                    String::new()
                } else {
                    format!("{} — ", label.join(", "))
                };
                out.push_str(&format!("\n▸ {heading}{}\n", fit_summary(fit, r, style.digits)));
                let Some(reader) = FitReader::of(fit) else {
                    continue;
                };
                let t = reader.terms_of(r);
                let columns: Vec<(String, ArrayRef)> = CARD_FIELDS
                    .iter()
                    .filter_map(|f| t.column_by_name(f.name()).map(|c| (f.name().to_string(), c.clone())))
                    .collect();
                let batch = RecordBatch::try_from_iter(columns)?;
                let table = text_table(&[batch], style)?;
                for line in table.lines() {
                    out.push_str("    ");
                    out.push_str(line);
                    out.push('\n');
                }
            }
        }
    }
    Ok(out)
}
