//! Design matrices: predictors -> dense column-major model matrix with readable column names.
//!
//! Coding rules (stable, part of the SQL contract):
//! * an intercept column named `intercept` comes first unless the caller asks for none;
//! * a numeric predictor gives one column named after the predictor;
//! * a factor gives one indicator column per non-reference level (treatment coding), named
//!   `name=level`, in the order of the factor's level list (the reference level is skipped);
//! * without an intercept, the first factor (in predictor order) keeps a column for every
//!   level, its reference included, so that each of its levels has its own log-rate (the
//!   columns span what intercept + treatment coding would span); later factors stay
//!   treatment-coded;
//! * an interaction of two predictors gives the element-wise products of their
//!   treatment-coded columns, named `a:b` (for example `material=pvc:age` or
//!   `material=pvc:soil=high`).
//!
//! Columns are stored contiguously (`n` values per column) so that the solver can run its
//! inner loops over plain slices.

use super::error::FitError;

/// Hard cap on the number of design columns one fit may have. A text column with thousands of
/// distinct values is almost always a key used by mistake; refusing it keeps a fit from
/// allocating an n x 10,000 matrix. 1,024 columns cost 8 MiB for X'WX alone.
pub const MAX_DESIGN_COLUMNS: usize = 1024;

/// A categorical predictor: one code per row, indexing `levels`.
#[derive(Debug, Clone, Copy)]
pub struct FactorColumn<'a> {
    /// Code of each row, `codes[i] < levels.len()`.
    pub codes: &'a [u32],
    /// Level labels, in the order their indicator columns appear.
    pub levels: &'a [String],
    /// Index into `levels` of the reference level (no column of its own).
    pub reference: usize,
}

/// One predictor of a model, borrowed from the caller's columns.
#[derive(Debug, Clone, Copy)]
pub enum PredictorValues<'a> {
    Numeric(&'a [f64]),
    Factor(FactorColumn<'a>),
}

/// A named predictor.
#[derive(Debug, Clone, Copy)]
pub struct Predictor<'a> {
    pub name: &'a str,
    pub values: PredictorValues<'a>,
}

/// What a design column represents; the solver treats all non-intercept columns alike.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ColumnKind {
    Intercept,
    Numeric,
    Indicator,
    Product,
}

/// The specification of a model's right-hand side.
#[derive(Debug, Clone)]
pub struct DesignSpec<'a> {
    pub intercept: bool,
    pub predictors: Vec<Predictor<'a>>,
    /// Pairs of indices into `predictors`.
    pub interactions: Vec<(usize, usize)>,
}

/// One predictor's part in a design column: its index and, for a factor, the level.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct SourcePart {
    pub predictor: usize,
    pub level: Option<String>,
}

/// How a design column was built from the predictors (what scoring needs to rebuild it).
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum ColumnSource {
    Intercept,
    /// A numeric predictor or one factor level.
    Main(SourcePart),
    /// The product of two parts (an interaction).
    Product(SourcePart, SourcePart),
    /// A ready-made column ([`Design::from_columns`]).
    Given,
}

/// A dense model matrix.
#[derive(Debug, Clone)]
pub struct Design {
    n: usize,
    values: Vec<f64>,
    names: Vec<String>,
    kinds: Vec<ColumnKind>,
    sources: Vec<ColumnSource>,
}

impl Design {
    /// Builds the model matrix for `n` rows. Every predictor must have `n` values; numeric
    /// values must be finite and factor codes in range.
    pub fn build(n: usize, spec: &DesignSpec<'_>) -> Result<Design, FitError> {
        let full = full_coded_factor(spec.intercept, spec.predictors.iter().map(Predictor::is_factor));
        let mains: Vec<Vec<Piece<'_>>> = spec
            .predictors
            .iter()
            .enumerate()
            .map(|(k, p)| pieces_of(k, p, full == Some(k)))
            .collect();
        let blocks: Vec<Vec<Piece<'_>>> = spec
            .predictors
            .iter()
            .enumerate()
            .map(|(k, p)| pieces_of(k, p, false))
            .collect();
        for p in &spec.predictors {
            check_predictor(n, p)?;
        }
        for &(a, b) in &spec.interactions {
            if a >= blocks.len() || b >= blocks.len() || a == b {
                return Err(FitError::BadSpec(format!(
                    "interaction ({a}, {b}) must name two different predictors out of {}",
                    blocks.len()
                )));
            }
        }
        let width = usize::from(spec.intercept)
            + mains.iter().map(Vec::len).sum::<usize>()
            + spec
                .interactions
                .iter()
                .map(|&(a, b)| blocks[a].len() * blocks[b].len())
                .sum::<usize>();
        if width > MAX_DESIGN_COLUMNS {
            return Err(FitError::TooManyColumns {
                columns: width,
                limit: MAX_DESIGN_COLUMNS,
            });
        }
        let mut design = Design {
            n,
            values: Vec::with_capacity(width * n),
            names: Vec::with_capacity(width),
            kinds: Vec::with_capacity(width),
            sources: Vec::with_capacity(width),
        };
        if spec.intercept {
            design.values.resize(n, 1.0);
            design.names.push("intercept".to_string());
            design.kinds.push(ColumnKind::Intercept);
            design.sources.push(ColumnSource::Intercept);
        }
        for block in &mains {
            for piece in block {
                design.push_piece(piece);
            }
        }
        for &(a, b) in &spec.interactions {
            for pa in &blocks[a] {
                for pb in &blocks[b] {
                    let start = design.values.len();
                    design.values.resize(start + n, 0.0);
                    let out = &mut design.values[start..];
                    for (i, o) in out.iter_mut().enumerate() {
                        *o = pa.value(i) * pb.value(i);
                    }
                    design.names.push(format!("{}:{}", pa.name(), pb.name()));
                    design.kinds.push(ColumnKind::Product);
                    design.sources.push(ColumnSource::Product(pa.source(), pb.source()));
                }
            }
        }
        Ok(design)
    }

    /// Builds a design from ready-made columns (used by tests and by collapsed fits).
    pub fn from_columns(n: usize, columns: Vec<(String, ColumnKind, Vec<f64>)>) -> Result<Design, FitError> {
        if columns.len() > MAX_DESIGN_COLUMNS {
            return Err(FitError::TooManyColumns {
                columns: columns.len(),
                limit: MAX_DESIGN_COLUMNS,
            });
        }
        let mut design = Design {
            n,
            values: Vec::with_capacity(n * columns.len()),
            names: Vec::new(),
            kinds: Vec::new(),
            sources: Vec::new(),
        };
        for (name, kind, values) in columns {
            if values.len() != n {
                return Err(FitError::LengthMismatch {
                    what: name,
                    expected: n,
                    found: values.len(),
                });
            }
            if let Some(i) = values.iter().position(|v| !v.is_finite()) {
                return Err(FitError::NonFinite {
                    column: name,
                    row: i,
                    value: values[i],
                });
            }
            design.values.extend_from_slice(&values);
            design.names.push(name);
            design.kinds.push(kind);
            design.sources.push(ColumnSource::Given);
        }
        Ok(design)
    }

    /// The rows listed in `rows`, in that order.
    pub fn select_rows(&self, rows: &[usize]) -> Design {
        let mut values = Vec::with_capacity(rows.len() * self.n_columns());
        for j in 0..self.n_columns() {
            let col = self.column(j);
            values.extend(rows.iter().map(|&i| col[i]));
        }
        Design {
            n: rows.len(),
            values,
            names: self.names.clone(),
            kinds: self.kinds.clone(),
            sources: self.sources.clone(),
        }
    }

    pub fn n_rows(&self) -> usize {
        self.n
    }
    pub fn n_columns(&self) -> usize {
        self.names.len()
    }
    pub fn names(&self) -> &[String] {
        &self.names
    }
    pub fn kinds(&self) -> &[ColumnKind] {
        &self.kinds
    }
    /// How each column was built, in column order.
    pub fn sources(&self) -> &[ColumnSource] {
        &self.sources
    }
    pub fn has_intercept(&self) -> bool {
        self.kinds.first() == Some(&ColumnKind::Intercept)
    }
    /// Column `j` as a slice of `n` values.
    pub fn column(&self, j: usize) -> &[f64] {
        &self.values[j * self.n..(j + 1) * self.n]
    }
    /// All values, column after column.
    pub fn values(&self) -> &[f64] {
        &self.values
    }

    fn push_piece(&mut self, piece: &Piece<'_>) {
        let start = self.values.len();
        self.values.resize(start + self.n, 0.0);
        let out = &mut self.values[start..];
        match piece {
            Piece::Numeric { values, .. } => out.copy_from_slice(values),
            Piece::Level { codes, code, .. } => {
                for (o, &c) in out.iter_mut().zip(codes.iter()) {
                    *o = if c == *code { 1.0 } else { 0.0 };
                }
            }
        }
        self.names.push(piece.name());
        self.kinds.push(match piece {
            Piece::Numeric { .. } => ColumnKind::Numeric,
            Piece::Level { .. } => ColumnKind::Indicator,
        });
        self.sources.push(ColumnSource::Main(piece.source()));
    }
}

/// One design column contributed by a predictor.
enum Piece<'a> {
    Numeric {
        predictor: usize,
        name: &'a str,
        values: &'a [f64],
    },
    Level {
        predictor: usize,
        name: &'a str,
        level: &'a str,
        codes: &'a [u32],
        code: u32,
    },
}

impl Piece<'_> {
    fn name(&self) -> String {
        match self {
            Piece::Numeric { name, .. } => (*name).to_string(),
            Piece::Level { name, level, .. } => format!("{name}={level}"),
        }
    }
    fn source(&self) -> SourcePart {
        match self {
            Piece::Numeric { predictor, .. } => SourcePart {
                predictor: *predictor,
                level: None,
            },
            Piece::Level { predictor, level, .. } => SourcePart {
                predictor: *predictor,
                level: Some((*level).to_string()),
            },
        }
    }
    fn value(&self, i: usize) -> f64 {
        match self {
            Piece::Numeric { values, .. } => values[i],
            Piece::Level { codes, code, .. } => f64::from(u8::from(codes[i] == *code)),
        }
    }
}

impl Predictor<'_> {
    pub fn is_factor(&self) -> bool {
        matches!(self.values, PredictorValues::Factor(_))
    }
}

/// The predictor (index) whose factor keeps every level: the first factor of a model without
/// an intercept (see the module doc). `is_factor` lists the predictors in order.
pub fn full_coded_factor(intercept: bool, mut is_factor: impl Iterator<Item = bool>) -> Option<usize> {
    if intercept { None } else { is_factor.position(|f| f) }
}

/// The columns of one predictor: a numeric predictor's values, or a factor's indicators (all
/// levels with `all_levels`, otherwise all but the reference).
fn pieces_of<'a>(predictor: usize, p: &Predictor<'a>, all_levels: bool) -> Vec<Piece<'a>> {
    match p.values {
        PredictorValues::Numeric(values) => vec![Piece::Numeric {
            predictor,
            name: p.name,
            values,
        }],
        PredictorValues::Factor(f) => f
            .levels
            .iter()
            .enumerate()
            .filter(|(code, _)| all_levels || *code != f.reference)
            .map(|(code, level)| Piece::Level {
                predictor,
                name: p.name,
                level,
                codes: f.codes,
                code: code as u32,
            })
            .collect(),
    }
}

fn check_predictor(n: usize, p: &Predictor<'_>) -> Result<(), FitError> {
    match p.values {
        PredictorValues::Numeric(values) => {
            if values.len() != n {
                return Err(FitError::LengthMismatch {
                    what: p.name.to_string(),
                    expected: n,
                    found: values.len(),
                });
            }
            if let Some(i) = values.iter().position(|v| !v.is_finite()) {
                return Err(FitError::NonFinite {
                    column: p.name.to_string(),
                    row: i,
                    value: values[i],
                });
            }
        }
        PredictorValues::Factor(f) => {
            if f.codes.len() != n {
                return Err(FitError::LengthMismatch {
                    what: p.name.to_string(),
                    expected: n,
                    found: f.codes.len(),
                });
            }
            if f.reference >= f.levels.len() && !(f.levels.is_empty() && n == 0) {
                return Err(FitError::BadSpec(format!(
                    "factor {} has {} levels; reference index {} is out of range",
                    p.name,
                    f.levels.len(),
                    f.reference
                )));
            }
            if let Some(i) = f.codes.iter().position(|&c| c as usize >= f.levels.len()) {
                return Err(FitError::BadSpec(format!(
                    "factor {} row {i} has code {} but only {} levels",
                    p.name,
                    f.codes[i],
                    f.levels.len()
                )));
            }
        }
    }
    Ok(())
}

/// An owned factor built from labels: levels sorted (byte order), codes per row.
#[derive(Debug, Clone, PartialEq)]
pub struct OwnedFactor {
    pub codes: Vec<u32>,
    pub levels: Vec<String>,
}

impl OwnedFactor {
    /// Levels are the distinct labels in sorted order; the reference is the first unless named.
    pub fn from_labels<S: AsRef<str>>(labels: &[S]) -> OwnedFactor {
        let mut levels: Vec<String> = labels.iter().map(|s| s.as_ref().to_string()).collect();
        levels.sort();
        levels.dedup();
        let codes = labels
            .iter()
            .map(|s| {
                levels
                    .binary_search_by(|l| l.as_str().cmp(s.as_ref()))
                    .expect("level present") as u32
            })
            .collect();
        OwnedFactor { codes, levels }
    }

    /// Borrow as a factor column with the given reference level (first level when `None`).
    pub fn column(&self, reference: Option<&str>) -> Result<FactorColumn<'_>, FitError> {
        let reference = match reference {
            None => 0,
            Some(name) => self.levels.iter().position(|l| l == name).ok_or_else(|| {
                FitError::BadSpec(format!(
                    "reference level '{name}' does not occur; levels are: {}",
                    self.levels.join(", ")
                ))
            })?,
        };
        Ok(FactorColumn {
            codes: &self.codes,
            levels: &self.levels,
            reference,
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn names_follow_the_coding_rules() {
        let material = OwnedFactor::from_labels(&["pvc", "iron", "pvc", "steel"]);
        let age = [1.0, 2.0, 3.0, 4.0];
        let spec = DesignSpec {
            intercept: true,
            predictors: vec![
                Predictor {
                    name: "material",
                    values: PredictorValues::Factor(material.column(None).unwrap()),
                },
                Predictor {
                    name: "age",
                    values: PredictorValues::Numeric(&age),
                },
            ],
            interactions: vec![(0, 1)],
        };
        let d = Design::build(4, &spec).unwrap();
        assert_eq!(
            d.names(),
            &[
                "intercept",
                "material=pvc",
                "material=steel",
                "age",
                "material=pvc:age",
                "material=steel:age"
            ]
        );
        assert_eq!(d.column(1), &[1.0, 0.0, 1.0, 0.0]);
        assert_eq!(d.column(4), &[1.0, 0.0, 3.0, 0.0]);
        assert_eq!(d.column(5), &[0.0, 0.0, 0.0, 4.0]);
    }

    #[test]
    fn refuses_too_many_columns_before_allocating() {
        let labels: Vec<String> = (0..5000).map(|i| format!("k{i}")).collect();
        let f = OwnedFactor::from_labels(&labels);
        let spec = DesignSpec {
            intercept: true,
            predictors: vec![Predictor {
                name: "key",
                values: PredictorValues::Factor(f.column(None).unwrap()),
            }],
            interactions: vec![],
        };
        let err = Design::build(5000, &spec).unwrap_err();
        assert!(err.to_string().contains("5000 design columns"), "{err}");
    }

    #[test]
    fn unknown_reference_level_lists_the_levels() {
        let f = OwnedFactor::from_labels(&["a", "b"]);
        let err = f.column(Some("c")).unwrap_err().to_string();
        assert!(err.contains("'c'") && err.contains("a, b"), "{err}");
    }
}
