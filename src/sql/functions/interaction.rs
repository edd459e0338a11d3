//! `interaction(a, b)`: marks a product term inside a fit call.
//!
//! Inside `poisson_fit(..., a, b, interaction(a, b))` the planner rewrites the marker away and
//! the fit adds the products of a's and b's design columns (numeric x numeric, factor x
//! numeric, factor x factor; names like `material=pvc:age`). Both a and b must also be given
//! as predictors of the same call. Evaluated on its own it returns the pair as a struct.

use std::sync::{Arc, LazyLock};

use datafusion::arrow::array::{ArrayRef, StructArray};
use datafusion::arrow::datatypes::{DataType, Field, Fields};
use datafusion::error::{DataFusionError, Result};
use datafusion::logical_expr::{
    ColumnarValue, Documentation, ScalarFunctionArgs, ScalarUDF, ScalarUDFImpl, Signature, Volatility,
};

use super::args::arg_arrays;
use crate::sql::model::aggregate::DOC_SECTION;

#[derive(Debug, PartialEq, Eq, Hash)]
pub struct Interaction {
    signature: Signature,
}

pub fn interaction() -> ScalarUDF {
    ScalarUDF::from(Interaction {
        signature: Signature::any(2, Volatility::Immutable),
    })
}

fn fields(types: &[DataType]) -> Result<Fields> {
    if types.len() != 2 {
        return Err(DataFusionError::Plan(format!(
            "interaction takes exactly 2 arguments, got {}",
            types.len()
        )));
    }
    Ok(Fields::from(vec![
        Field::new("left", types[0].clone(), true),
        Field::new("right", types[1].clone(), true),
    ]))
}

impl ScalarUDFImpl for Interaction {
    fn name(&self) -> &str {
        "interaction"
    }
    fn signature(&self) -> &Signature {
        &self.signature
    }
    fn return_type(&self, arg_types: &[DataType]) -> Result<DataType> {
        Ok(DataType::Struct(fields(arg_types)?))
    }
    fn invoke_with_args(&self, args: ScalarFunctionArgs) -> Result<ColumnarValue> {
        let arrays = arg_arrays(&args)?;
        let types: Vec<DataType> = arrays.iter().map(|a| a.data_type().clone()).collect();
        let s = StructArray::new(fields(&types)?, arrays, None);
        Ok(ColumnarValue::Array(Arc::new(s) as ArrayRef))
    }
    fn documentation(&self) -> Option<&Documentation> {
        Some(&DOC)
    }
}

static DOC: LazyLock<Documentation> = LazyLock::new(|| {
    Documentation::builder(
        DOC_SECTION,
        "Adds the interaction of two predictors to a fit: the products of their design columns, named \
         like `material=pvc:age`. Both predictors must also appear on their own in the same call.",
        "interaction(a, b)",
    )
    .with_argument("a", "A predictor of the same fit call.")
    .with_argument("b", "Another predictor of the same fit call.")
    .with_sql_example(
        "SELECT fit_term(poisson_fit(breaks, km_years, material, age, interaction(material, age)), 'material=pvc:age')['estimate'] AS slope_difference\n\
         FROM (VALUES (3, 10.0, 'iron', 10.0), (6, 10.0, 'iron', 30.0), (4, 12.0, 'iron', 20.0), (2, 9.0, 'pvc', 10.0), (2, 11.0, 'pvc', 30.0), (3, 10.0, 'pvc', 20.0)) AS t(breaks, km_years, material, age);",
    )
    .build()
});
