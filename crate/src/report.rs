//! Reports of an analysis: the versioned JSON document and the short human summary.
//!
//! The JSON schema is `bitloupe.report/1`; README.md documents every field.

use crate::analysis::Analysis;
use crate::cost::BitCost;
use crate::metrics::ErrorFigures;
use crate::recipe::Recipe;
use crate::tensor::Tensor;
use serde::Serialize;

/// Identifies the JSON report's layout; bumped on any incompatible change.
pub const SCHEMA: &str = "bitloupe.report/1";

/// Printed with every result that may feed a deployment decision.
pub const CAUTION: &str = "Per-tensor error is only a proxy: check any recipe on the model's own task before deploying it.";

/// How many outlier columns a report lists.
const REPORTED_OUTLIERS: usize = 32;

/// The tensor a report is about.
#[derive(Debug, Clone, Serialize)]
pub struct TensorSummary<'a> {
    /// Name in its file.
    pub name: &'a str,
    /// Source element type.
    pub dtype: &'static str,
    /// Shape as stored.
    pub shape: &'a [usize],
}

/// Per-group figures as the report carries them.
#[derive(Debug, Clone, Serialize)]
pub struct GroupSection<'a> {
    /// Rows of the group grid.
    pub rows: usize,
    /// Groups per row.
    pub per_row: usize,
    /// Elements per group, when grouped.
    pub group_size: Option<usize>,
    /// MSE of each group, row-major.
    pub mse: &'a [f32],
    /// Largest absolute error of each group, row-major.
    pub max_abs_err: &'a [f32],
}

/// One outlier input column.
#[derive(Debug, Clone, Serialize)]
pub struct OutlierColumn {
    /// Column index.
    pub column: usize,
    /// Its largest magnitude.
    pub max_abs: f32,
    /// max |w| over the median column's.
    pub score: f32,
    /// RMS of its quantization error.
    pub err_rms: f32,
}

/// The JSON report.
#[derive(Debug, Clone, Serialize)]
pub struct Report<'a> {
    /// Layout identifier, [`SCHEMA`].
    pub schema: &'static str,
    /// The tensor.
    pub tensor: TensorSummary<'a>,
    /// The recipe.
    pub recipe: Recipe,
    /// Short recipe label.
    pub label: String,
    /// Total bits / elements.
    pub bits_per_weight: f64,
    /// Total bits including scales and zero points.
    pub total_bits: u64,
    /// Whole bytes for the total.
    pub bytes: u64,
    /// Whole-tensor figures, flattened into this object.
    #[serde(flatten)]
    pub totals: ErrorFigures,
    /// The bit budget by part.
    pub cost: BitCost,
    /// Per-group figures.
    pub groups: GroupSection<'a>,
    /// How many input columns score as outliers.
    pub outlier_column_count: usize,
    /// The most outlying input columns (up to 32), largest score first.
    pub outlier_columns: Vec<OutlierColumn>,
    /// [`CAUTION`].
    pub caution: &'static str,
}

impl<'a> Report<'a> {
    /// The report of `analysis` run on `tensor`.
    pub fn new(tensor: &'a Tensor, analysis: &'a Analysis) -> Self {
        let columns = &analysis.columns;
        let outliers = columns.outliers();
        let outlier_column_count = outliers.len();
        let outlier_columns = outliers
            .into_iter()
            .take(REPORTED_OUTLIERS)
            .map(|j| OutlierColumn {
                column: j,
                max_abs: columns.max_abs[j],
                score: columns.outlier_score[j],
                err_rms: columns.err_rms[j],
            })
            .collect();
        Report {
            schema: SCHEMA,
            tensor: TensorSummary { name: &tensor.name, dtype: tensor.dtype.name(), shape: &tensor.shape },
            recipe: analysis.recipe,
            label: analysis.recipe.label(),
            bits_per_weight: analysis.cost.bits_per_weight,
            total_bits: analysis.cost.total_bits,
            bytes: analysis.cost.bytes,
            totals: analysis.totals,
            cost: analysis.cost,
            groups: GroupSection {
                rows: analysis.groups.rows,
                per_row: analysis.groups.per_row,
                group_size: analysis.groups.group_size,
                mse: &analysis.groups.mse,
                max_abs_err: &analysis.groups.max_abs_err,
            },
            outlier_column_count,
            outlier_columns,
            caution: CAUTION,
        }
    }

    /// The same report without the per-group lists, for front ends that take those as typed
    /// arrays instead.
    pub fn without_group_lists(mut self) -> Self {
        self.groups.mse = &[];
        self.groups.max_abs_err = &[];
        self
    }

    /// The report as pretty JSON.
    pub fn to_json(&self) -> String {
        serde_json::to_string_pretty(self).expect("reports hold only finite numbers and strings")
    }

    /// A few lines for a terminal.
    pub fn summary(&self) -> String {
        let sqnr = match self.totals.sqnr_db {
            Some(db) => format!("{db:.2} dB"),
            None => "exact (no error)".into(),
        };
        let c = &self.cost;
        let name = if self.tensor.name.is_empty() { "(unnamed)" } else { self.tensor.name };
        format!(
            "tensor     {name}  {}  {:?}\n\
             recipe     {}\n\
             size       {:.4} bits/weight, {} bytes ({:.2}x smaller than {}, {:.2}x smaller than 16-bit)\n\
             budget     payload {} + scales {} + zero points {} = {} bits\n\
             error      SQNR {sqnr}, relative {:.4e}, MSE {:.4e}, max {:.4e}\n\
             outliers   {} input columns at least {}x the median column's max |w|\n\
             caution    {}",
            self.tensor.dtype,
            self.tensor.shape,
            self.label,
            c.bits_per_weight,
            c.bytes,
            c.ratio_to_source,
            self.tensor.dtype,
            c.ratio_to_16bit,
            c.payload_bits,
            c.scale_bits,
            c.zero_point_bits,
            c.total_bits,
            self.totals.rel_fro_err,
            self.totals.mse,
            self.totals.max_abs_err,
            self.outlier_column_count,
            crate::metrics::OUTLIER_SCORE,
            self.caution,
        )
    }
}
