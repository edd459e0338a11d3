//! `ratesheet_version()`: the version of the ratesheet build that evaluates the call.
//!
//! Volatile on purpose: the planner must not fold it into a constant, so on a cluster the
//! executor that runs the task answers with its own version (the client's handshake compares it
//! with its own).

use std::sync::{Arc, LazyLock};

use datafusion::arrow::array::StringArray;
use datafusion::arrow::datatypes::DataType;
use datafusion::error::Result;
use datafusion::logical_expr::{
    ColumnarValue, Documentation, ScalarFunctionArgs, ScalarUDF, ScalarUDFImpl, Signature, Volatility,
};

use crate::sql::model::aggregate::DOC_SECTION;

/// This build's version, as Cargo knows it.
pub const VERSION: &str = env!("CARGO_PKG_VERSION");

#[derive(Debug, PartialEq, Eq, Hash)]
pub struct RatesheetVersion {
    signature: Signature,
}

pub fn ratesheet_version() -> ScalarUDF {
    ScalarUDF::from(RatesheetVersion {
        signature: Signature::nullary(Volatility::Volatile),
    })
}

impl ScalarUDFImpl for RatesheetVersion {
    fn name(&self) -> &str {
        "ratesheet_version"
    }
    fn signature(&self) -> &Signature {
        &self.signature
    }
    fn return_type(&self, _arg_types: &[DataType]) -> Result<DataType> {
        Ok(DataType::Utf8)
    }
    fn invoke_with_args(&self, args: ScalarFunctionArgs) -> Result<ColumnarValue> {
        Ok(ColumnarValue::Array(Arc::new(StringArray::from(vec![
            VERSION;
            args.number_rows
        ]))))
    }
    fn documentation(&self) -> Option<&Documentation> {
        Some(&DOC)
    }
}

static DOC: LazyLock<Documentation> = LazyLock::new(|| {
    Documentation::builder(
        DOC_SECTION,
        "Returns the version of the ratesheet build that evaluates the call (on a cluster: the \
         executor's).",
        "ratesheet_version()",
    )
    .with_sql_example("SELECT ratesheet_version();")
    .build()
});
