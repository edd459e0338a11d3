//! Evaluation: each group's data, taken from a buffer in canonical order, is coded into a
//! design (factor levels per group, reference levels), fitted by the numerical core and
//! reported through the field table.

use datafusion::arrow::array::StructArray;
use datafusion::error::{DataFusionError, Result};
use std::sync::atomic::{AtomicUsize, Ordering};

use super::decode::Dictionary;
use super::fields::{DesignEntry, FitColumns, GroupReport, PredictorInfo};
use super::group_buffer::{Column, GroupBuffer, GroupData, Response};
use super::options::CiMethod;
use super::spec::BufferKind;
use crate::glm::collapse::{Sums, fit_poisson_patterns};
use crate::glm::design::full_coded_factor;
use crate::glm::fit_negative_binomial;
use crate::glm::inference::coefficient_covariance;
use crate::glm::negbin::loglik_at_means;
use crate::glm::profile::{FunctionRefit, IrlsRefit, profile_interval};
use crate::glm::{
    Design, DesignSpec, FactorColumn, FamilyKind, FitInput, Gaussian, GlmFit, Poisson, Predictor, PredictorValues, fit,
    term_table,
};
use crate::glm::{Family, SeType, TermRow, TermState};

/// Fits every group of `buffer` and returns one struct per group.
pub fn evaluate_groups<B: GroupBuffer>(buffer: &mut B) -> Result<StructArray> {
    let mut out = FitColumns::new();
    let groups = buffer.num_groups();
    FIT_PROGRESS.groups_started.fetch_add(groups, Ordering::Relaxed);
    buffer.visit_groups(|g, data| {
        fit_group(data, &mut out)?;
        if g == 0 {
            out.reserve_like_pushed(groups - 1);
        }
        FIT_PROGRESS.groups_fitted.fetch_add(1, Ordering::Relaxed);
        Ok(())
    })?;
    out.finish()
}

/// Process-wide counts of groups handed to the fit and fitted, for progress displays: a reader
/// takes the difference between two moments (the counts only grow).
pub struct FitProgress {
    pub groups_started: AtomicUsize,
    pub groups_fitted: AtomicUsize,
}

pub static FIT_PROGRESS: FitProgress = FitProgress {
    groups_started: AtomicUsize::new(0),
    groups_fitted: AtomicUsize::new(0),
};

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
        ci_method: settings.ci.name(),
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
            return out.push(&report(p.clone(), 0), Vec::new(), &infos, &[], None);
        }
        // A too-wide design is a property of this group's data: it is reported on the group.
        (None, Err(e)) => {
            return out.push(&report(format!("not fitted: {e}"), 0), Vec::new(), &infos, &[], None);
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
    if settings.ci == CiMethod::Profile {
        profile_terms(data, &design, &fitted, &mut terms)?;
    }
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
    let covariance = coefficient_covariance(&fitted, settings.se_type());
    out.push(&report, terms, &infos, &entries, covariance.as_ref())
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
        Response::Rows { .. } => {
            let (y, offset) = model_response(data);
            let input = FitInput {
                y: &y,
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

/// The response and offset the model sees: each row's (log exposure), or each pattern's totals.
fn model_response(data: &GroupData<'_>) -> (Vec<f64>, Option<Vec<f64>>) {
    match &data.response {
        Response::Rows { y, exposure } => (
            y.clone(),
            data.spec
                .kind
                .has_exposure()
                .then(|| exposure.iter().map(|e| e.ln()).collect()),
        ),
        Response::Patterns(sums) => (
            sums.iter().map(Sums::total_count).collect(),
            Some(sums.iter().map(|s| s.total_exposure().ln()).collect()),
        ),
    }
}

/// Profile-likelihood limits in place of the Wald ones (option `ci=profile`): per estimated or
/// boundary term, refits with the coefficient held fixed (see `glm::profile`). Pattern fits are
/// profiled on the patterns, whose log-likelihood differs from the rows' by a constant.
fn profile_terms(data: &GroupData<'_>, design: &Design, fitted: &GlmFit, terms: &mut [TermRow]) -> Result<()> {
    let spec = data.spec;
    let options = spec.settings.fit_options();
    let (y, offset) = model_response(data);
    let input = FitInput {
        y: &y,
        offset: offset.as_deref(),
        weights: None,
    };
    let exec = |e: crate::glm::FitError| DataFusionError::Execution(format!("{}: {e}", spec.kind.sql_name()));
    let negative_binomial = spec.family() == FamilyKind::NegativeBinomial;
    // Full refits: negative binomial (alpha re-estimated), and Poisson fits with a term at the
    // boundary (the refits need the boundary handling of a full fit). Other Poisson refits are
    // bare, warm-started IRLS.
    let full_refit = |d: &Design, i: FitInput<'_>| -> std::result::Result<Option<f64>, crate::glm::FitError> {
        let means = || -> Vec<f64> {
            i.offset
                .map_or_else(|| vec![1.0; i.y.len()], |o| o.iter().map(|v| v.exp()).collect())
        };
        Ok(match (d.n_columns(), negative_binomial) {
            (0, true) => Some(loglik_at_means(i.y, &means(), i.weights)),
            (0, false) => Some(Poisson.log_likelihood(i.y, &means(), &vec![1.0; i.y.len()])),
            (_, true) => fit_negative_binomial(d, i, options)?.stats.loglik,
            (_, false) => fit(&Poisson, d, i, options)?.stats.loglik,
        })
    };
    // The fit the profile starts from, on the same level (rows or patterns) as the refits.
    let pattern_fit;
    let base = match &data.response {
        Response::Patterns(_) => {
            pattern_fit = fit(&Poisson, design, input, options).map_err(exec)?;
            &pattern_fit
        }
        Response::Rows { .. } => fitted,
    };
    let dispersion = if spec.settings.se_type() == SeType::Quasi {
        fitted.dispersion().unwrap_or(f64::NAN)
    } else {
        1.0
    };
    for (j, t) in terms.iter_mut().enumerate() {
        if !matches!(base.states[j], TermState::Estimated | TermState::Boundary) || !dispersion.is_finite() {
            continue;
        }
        let limits = if negative_binomial || base.states.contains(&TermState::Boundary) {
            let mut model = FunctionRefit::new(design, input, j, full_refit).map_err(exec)?;
            profile_interval(&mut model, base, j, spec.settings.level, dispersion)
        } else {
            let mut model = IrlsRefit::new(&Poisson, design, input, base, j, options).map_err(exec)?;
            profile_interval(&mut model, base, j, spec.settings.level, dispersion)
        }
        .map_err(exec)?;
        (t.ci_low, t.ci_high) = (limits.low, limits.high);
        (t.rr_low, t.rr_high) = (limits.low.map(f64::exp), limits.high.map(f64::exp));
        if base.states[j] == TermState::Boundary {
            t.flag = Some(match (limits.low, limits.high) {
                (None, Some(_)) => "boundary (lower limit infinite)",
                (Some(_), None) => "boundary (upper limit infinite)",
                _ => "boundary",
            });
        }
    }
    Ok(())
}
