//! `fit_term(fit, 'term')`: one term of a fit as a struct, without unnesting.

use std::sync::{Arc, LazyLock};

use datafusion::arrow::array::{Array, ArrayRef, StructArray, UInt32Array};
use datafusion::arrow::compute::take;
use datafusion::arrow::datatypes::DataType;
use datafusion::error::Result;
use datafusion::logical_expr::{
    ColumnarValue, Documentation, ScalarFunctionArgs, ScalarUDF, ScalarUDFImpl, Signature, Volatility,
};

use super::args::{arg_arrays, exec_error, texts};
use crate::sql::model::aggregate::DOC_SECTION;
use crate::sql::model::fields::term_type;
use crate::sql::model::fields::{FitReader, TermField};

#[derive(Debug, PartialEq, Eq, Hash)]
pub struct FitTerm {
    signature: Signature,
}

pub fn fit_term() -> ScalarUDF {
    ScalarUDF::from(FitTerm {
        signature: Signature::any(2, Volatility::Immutable),
    })
}

impl ScalarUDFImpl for FitTerm {
    fn name(&self) -> &str {
        "fit_term"
    }
    fn signature(&self) -> &Signature {
        &self.signature
    }
    fn return_type(&self, _arg_types: &[DataType]) -> Result<DataType> {
        Ok(term_type())
    }
    /// NULL when the fit is NULL or has no term of that name.
    fn invoke_with_args(&self, args: ScalarFunctionArgs) -> Result<ColumnarValue> {
        let arrays = arg_arrays(&args)?;
        let view = FitReader::new("fit_term", &arrays[0])?;
        let names =
            texts(&arrays[1]).map_err(|_| exec_error("fit_term: the second argument must be a term name".into()))?;
        let picks: UInt32Array = (0..args.number_rows)
            .map(|r| {
                if view.is_null(r) || names.is_null(r) {
                    return None;
                }
                view.term_range(r)
                    .find(|&i| view.term_text(TermField::Term, i) == Some(names.value(r)))
                    .map(|i| i as u32)
            })
            .collect();
        let values: &StructArray = view.term_values();
        let columns: Vec<ArrayRef> = values
            .columns()
            .iter()
            .map(|c| take(c.as_ref(), &picks, None))
            .collect::<std::result::Result<_, _>>()?;
        let out = StructArray::new(values.fields().clone(), columns, picks.nulls().cloned());
        Ok(ColumnarValue::Array(Arc::new(out)))
    }
    fn documentation(&self) -> Option<&Documentation> {
        Some(&DOC)
    }
}

static DOC: LazyLock<Documentation> = LazyLock::new(|| {
    Documentation::builder(
        DOC_SECTION,
        "Returns one term of a fit as a struct with fields term, estimate, std_error, z, p_value, ci_low, \
         ci_high, rate_ratio, rr_low, rr_high, flag; NULL when the fit has no such term. Read a field with \
         brackets: fit_term(fit, 'material=pvc')['rate_ratio'].",
        "fit_term(fit, term)",
    )
    .with_argument("fit", "A fit returned by poisson_fit, poisson_count_fit or linear_fit.")
    .with_argument("term", "Term name, e.g. 'intercept', 'age' or 'material=pvc'.")
    .with_sql_example(
        "SELECT fit_term(poisson_fit(breaks, km_years, material), 'material=pvc')['rate_ratio'] AS rr\n\
         FROM (VALUES (12, 40.0, 'iron'), (3, 30.0, 'pvc'), (9, 35.0, 'iron'), (2, 28.0, 'pvc')) AS t(breaks, km_years, material);",
    )
    .build()
});
