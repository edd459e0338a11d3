//! Evaluation: each group's data, taken from a buffer in canonical order, is coded into a
//! design (factor levels per group, reference levels), fitted by the numerical core and
//! reported through the field table.

use datafusion::arrow::array::StructArray;
use datafusion::error::{DataFusionError, Result};

use super::decode::Dictionary;
use super::fields::{DesignEntry, FitColumns, GroupReport, PredictorInfo};
use super::group_buffer::{Column, GroupBuffer, GroupData, Response};
use super::spec::BufferKind;
use crate::glm::collapse::fit_poisson_patterns;
use crate::glm::design::full_coded_factor;
use crate::glm::fit_negative_binomial;
use crate::glm::{
    Design, DesignSpec, FactorColumn, FamilyKind, FitInput, Gaussian, GlmFit, Poisson, Predictor, PredictorValues, fit,
    term_table,
};

/// Fits every group of `buffer` and returns one struct per group.
pub fn evaluate_groups<B: GroupBuffer>(buffer: &B) -> Result<StructArray> {
    let mut out = FitColumns::new();
    let (offsets, mut order) = buffer.buckets();
    let keys = buffer.hash_keys();
    for g in 0..buffer.num_groups() {
        let items = &mut order[offsets[g]..offsets[g + 1]];
        buffer.sort_canonically(items, &keys);
        fit_group(&buffer.group_data(g, items), &mut out)?;
    }
    Ok(out.finish())
}

/// Per-group factor levels: the labels that occur, sorted, with the reference first.
struct GroupFactor {
    codes: Vec<u32>,
    levels: Vec<String>,
    reference: usize,
}

/// The group's levels of a factor and its codes renumbered to them (levels in label order).
fn group_factor(codes: &[u32], dictionary: &Dictionary) -> (Vec<u32>, Vec<String>) {
    let mut present: Vec<u32> = codes.to_vec();
    present.sort_unstable();
    present.dedup();
    let mut by_label: Vec<usize> = (0..present.len()).collect();
    by_label.sort_by(|&a, &b| dictionary.labels[present[a] as usize].cmp(&dictionary.labels[present[b] as usize]));
    let mut rank = vec![0u32; present.len()];
    for (r, &k) in by_label.iter().enumerate() {
        rank[k] = r as u32;
    }
    let levels = by_label
        .iter()
        .map(|&k| dictionary.labels[present[k] as usize].clone())
        .collect();
    let local = codes
        .iter()
        .map(|c| rank[present.binary_search(c).unwrap_or(0)])
        .collect();
    (local, levels)
}

/// Appended to the status of a least-squares fit whose response is not a logarithm: exp of its
/// coefficients is no ratio, so the `rate_ratio`, `rr_low` and `rr_high` fields are NULL.
const NO_RATIO_NOTE: &str =
    "; rate ratios not reported (the response is not a natural logarithm; write ln(...) or the option response=log)";

fn fit_group(data: &GroupData<'_>, out: &mut FitColumns) -> Result<()> {
    let spec = data.spec;
    let settings = &spec.settings;
    let n = data.design_rows();
    let mut factors: Vec<Option<GroupFactor>> = Vec::new();
    let mut problem: Option<String> = None;
    for ((c, p), dictionary) in data.columns.iter().zip(&spec.predictors).zip(data.dictionaries) {
        match c {
            Column::Numeric(_) => factors.push(None),
            Column::Factor(codes) => {
                let (group_codes, levels) = group_factor(codes, dictionary);
                let reference = match settings.references.get(&p.name) {
                    None => 0,
                    Some(r) => match levels.iter().position(|l| l == r) {
                        Some(k) => k,
                        None => {
                            if n > 0 {
                                problem.get_or_insert(format!(
                                    "reference level {r} of {} does not occur in this group (levels: {})",
                                    p.name,
                                    levels.join(", ")
                                ));
                            }
                            0
                        }
                    },
                };
                factors.push(Some(GroupFactor {
                    codes: group_codes,
                    levels,
                    reference,
                }));
            }
        }
    }
    let predictors: Vec<Predictor<'_>> = spec
        .predictors
        .iter()
        .enumerate()
        .map(|(k, p)| Predictor {
            name: &p.name,
            values: match (&data.columns[k], &factors[k]) {
                (Column::Numeric(v), _) => PredictorValues::Numeric(v),
                (_, Some(f)) => PredictorValues::Factor(FactorColumn {
                    codes: &f.codes,
                    levels: &f.levels,
                    reference: f.reference,
                }),
                _ => unreachable!("factor columns have group levels"),
            },
        })
        .collect();
    let full = full_coded_factor(settings.intercept, factors.iter().map(Option::is_some));
    let infos: Vec<PredictorInfo> = spec
        .predictors
        .iter()
        .zip(&factors)
        .enumerate()
        .map(|(k, (p, f))| PredictorInfo {
            name: p.name.clone(),
            kind: p.kind,
            // A factor coded with every level has no reference level.
            reference: f
                .as_ref()
                .filter(|_| full != Some(k))
                .and_then(|f| f.levels.get(f.reference).cloned()),
        })
        .collect();
    let (total_count, total_exposure) = data.totals();
    let report = |status: String, n_params: usize| GroupReport {
        status,
        family: spec.family(),
        fit: None,
        n_used: data.data_rows() as u64,
        n_skipped: data.skipped,
        n_invalid: data.invalid,
        n_params: n_params as u64,
        se_type: &settings.se,
        level: settings.level,
        total_count: spec.kind.counts().then_some(total_count),
        total_exposure: spec.kind.has_exposure().then_some(total_exposure),
    };
    let design_spec = DesignSpec {
        intercept: settings.intercept,
        predictors,
        interactions: spec.interactions.clone(),
    };
    let design = match (&problem, Design::build(n, &design_spec)) {
        (Some(p), _) => {
            out.push(&report(p.clone(), 0), Vec::new(), &infos, &[]);
            return Ok(());
        }
        // A too-wide design is a property of this group's data: it is reported on the group.
        (None, Err(e)) => {
            out.push(&report(format!("not fitted: {e}"), 0), Vec::new(), &infos, &[]);
            return Ok(());
        }
        (None, Ok(d)) => d,
    };
    let entries: Vec<DesignEntry> = design
        .names()
        .iter()
        .zip(design.sources())
        .map(|(name, source)| DesignEntry::new(name, source))
        .collect();
    let fitted =
        fit_design(data, &design).map_err(|e| DataFusionError::Execution(format!("{}: {e}", spec.kind.sql_name())))?;
    let mut terms = term_table(&fitted, settings.se_type(), settings.level)
        .map_err(|e| DataFusionError::Execution(e.to_string()))?;
    let mut status = fitted.status();
    if !spec.ratio_scale {
        for t in &mut terms {
            (t.rate_ratio, t.rr_low, t.rr_high) = (None, None, None);
        }
        status.push_str(NO_RATIO_NOTE);
    }
    let report = GroupReport {
        fit: Some(&fitted),
        ..report(status, design.n_columns())
    };
    out.push(&report, terms, &infos, &entries);
    Ok(())
}

/// The fit of one group's design: on pattern sums, or on rows with the spec's family (one
/// monomorphic call per family).
fn fit_design(data: &GroupData<'_>, design: &Design) -> std::result::Result<GlmFit, crate::glm::FitError> {
    let spec = data.spec;
    let options = spec.settings.fit_options();
    match &data.response {
        Response::Patterns(sums) => {
            debug_assert_eq!(spec.buffer, BufferKind::Patterns);
            fit_poisson_patterns(design, sums, options)
        }
        Response::Rows { y, exposure } => {
            let offset: Option<Vec<f64>> = spec
                .kind
                .has_exposure()
                .then(|| exposure.iter().map(|e| e.ln()).collect());
            let input = FitInput {
                y,
                offset: offset.as_deref(),
                weights: None,
            };
            match spec.family() {
                FamilyKind::Poisson => fit(&Poisson, design, input, options),
                FamilyKind::Gaussian => fit(&Gaussian, design, input, options),
                FamilyKind::NegativeBinomial => fit_negative_binomial(design, input, options),
            }
        }
    }
}
