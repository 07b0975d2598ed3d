//! Reports of an analysis: the versioned JSON document and the short human summary.
//!
//! The JSON schema is `bitloupe.report/1`; README.md documents every field.

use crate::analysis::Analysis;
use crate::calib::OutputError;
use crate::cost::BitCost;
use crate::methods::smooth::SmoothingStudy;
use crate::methods::MethodFigures;
use crate::metrics::ErrorFigures;
use crate::recipe::Recipe;
use crate::tensor::{view_2d, Tensor};
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
    /// The method and its own figures (chosen α, iterations, accumulated loss, …).
    pub method: &'a MethodFigures,
    /// ‖X·Ŵᵀ − X·Wᵀ‖_F / ‖X·Wᵀ‖_F, when calibration data was given.
    pub output_rel_err: Option<f64>,
    /// Whether `output_rel_err` is the diagonal estimate from per-column statistics.
    pub output_estimated: Option<bool>,
    /// Output error per output row, when calibration data was given.
    pub output_rel_err_per_row: Option<&'a [f32]>,
    /// Per-group figures.
    pub groups: GroupSection<'a>,
    /// The W8A8 smoothing study, when one was asked for.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub smoothing: Option<&'a SmoothingStudy>,
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
            method: &analysis.method,
            output_rel_err: analysis.output.as_ref().map(|o| o.rel_err),
            output_estimated: analysis.output.as_ref().map(|o| o.estimated),
            output_rel_err_per_row: analysis.output.as_ref().map(|o: &OutputError| o.per_row.as_slice()),
            groups: GroupSection {
                rows: analysis.groups.rows,
                per_row: analysis.groups.per_row,
                group_size: analysis.groups.group_size,
                mse: &analysis.groups.mse,
                max_abs_err: &analysis.groups.max_abs_err,
            },
            smoothing: None,
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
        self.output_rel_err_per_row = None;
        self
    }

    /// The same report with a W8A8 smoothing study.
    pub fn with_smoothing(mut self, study: &'a SmoothingStudy) -> Self {
        self.smoothing = Some(study);
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
        let output = match (self.output_rel_err, self.output_estimated) {
            (Some(e), Some(true)) => format!("output     relative error {e:.4e} (estimated from per-column statistics)\n"),
            (Some(e), _) => format!("output     relative error {e:.4e} on the calibration sample\n"),
            _ => String::new(),
        };
        let method = method_line(self.method);
        let smoothing = self.smoothing.map_or(String::new(), |st| {
            format!(
                "W8A8       output error {:.4e} without smoothing, {:.4e} with alpha {} (best alpha on the curve: {:.2}), activations per {}\n",
                st.error_without,
                st.error_with,
                st.alpha,
                st.best_alpha,
                if st.act == crate::methods::smooth::ActQuant::Token { "token" } else { "tensor" }
            )
        });
        let name = if self.tensor.name.is_empty() { "(unnamed)" } else { self.tensor.name };
        format!(
            "tensor     {name}  {}  {:?}\n\
             recipe     {}\n\
             {method}\
             size       {} bits/weight, {} bytes ({:.2}x smaller than {}, {:.2}x smaller than 16-bit)\n\
             budget     payload {} + scales {} + zero points {} + kept {} + column factors {} = {} bits\n\
             error      SQNR {sqnr}, relative {:.4e}, MSE {:.4e}, max {:.4e}\n\
             {output}\
             outliers   {} input columns at least {}x the median column's max |w|\n\
             {smoothing}\
             caution    {}",
            self.tensor.dtype,
            self.tensor.shape,
            self.label,
            four_places(c.bits_per_weight),
            c.bytes,
            c.ratio_to_source,
            self.tensor.dtype,
            c.ratio_to_16bit,
            c.payload_bits,
            c.scale_bits,
            c.zero_point_bits,
            c.kept_bits,
            c.column_factor_bits,
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

impl Report<'_> {
    /// A Markdown summary to paste into a design document: recipe, figures, bit budget and the
    /// caution line.
    pub fn to_markdown(&self) -> String {
        let c = &self.cost;
        let sqnr = self.totals.sqnr_db.map_or("exact (no error)".to_string(), |db| format!("{db:.2} dB"));
        let name = if self.tensor.name.is_empty() { "(unnamed)" } else { self.tensor.name };
        let mut out = format!("### Quantizing `{name}` ({} {:?}) with {}\n\n", self.tensor.dtype, self.tensor.shape, self.label);
        out.push_str("| figure | value |\n| --- | --- |\n");
        out.push_str(&format!("| bits per weight | {} |\n", four_places(c.bits_per_weight)));
        out.push_str(&format!(
            "| size | {} bytes ({:.2}× smaller than {}, {:.2}× smaller than 16-bit) |\n",
            c.bytes, c.ratio_to_source, self.tensor.dtype, c.ratio_to_16bit
        ));
        out.push_str(&format!("| SQNR | {sqnr} |\n| relative error ‖W − Ŵ‖/‖W‖ | {:.4e} |\n", self.totals.rel_fro_err));
        out.push_str(&format!("| MSE | {:.4e} |\n| max error | {:.4e} |\n", self.totals.mse, self.totals.max_abs_err));
        if let Some(e) = self.output_rel_err {
            let how = if self.output_estimated == Some(true) { "estimated from per-column statistics" } else { "on the calibration sample" };
            out.push_str(&format!("| output error ‖XŴᵀ − XWᵀ‖/‖XWᵀ‖ | {e:.4e} ({how}) |\n"));
        }
        out.push_str(&format!("| outlier input columns | {} |\n\n", self.outlier_column_count));
        out.push_str("Bit budget:\n\n| part | bits | bits per weight |\n| --- | --- | --- |\n");
        let n = c.elements.max(1) as f64;
        for (part, bits) in [("codes", c.payload_bits), ("scales or levels", c.scale_bits), ("zero points", c.zero_point_bits), ("kept values and indices", c.kept_bits), ("per-column factors", c.column_factor_bits)] {
            if bits > 0 || part == "codes" {
                out.push_str(&format!("| {part} | {bits} | {} |\n", four_places(bits as f64 / n)));
            }
        }
        out.push_str(&format!("| total | {} | {} |\n\n", c.total_bits, four_places(c.bits_per_weight)));
        out.push_str(&format!("Recipe (JSON): `{}`\n\n> {}\n", serde_json::to_string(&self.recipe).expect("plain data"), self.caution));
        out
    }

    /// Per-group figures as CSV: row, first and last column, MSE, max error.
    pub fn groups_csv(&self) -> String {
        let g = &self.groups;
        let mut out = String::from("row,group,first_column,last_column,mse,max_abs_err\n");
        let cols = view_2d(self.tensor.shape).map_or(0, |(_, cols)| cols);
        let width = g.group_size.unwrap_or(cols);
        for (i, (mse, max)) in g.mse.iter().zip(g.max_abs_err).enumerate() {
            let (r, k) = (i / g.per_row.max(1), i % g.per_row.max(1));
            let first = k * width;
            let last = ((k + 1) * width).min(cols).saturating_sub(1);
            out.push_str(&format!("{r},{k},{first},{last},{mse},{max}\n"));
        }
        out
    }
}

/// One line on what the method did, or nothing for round to nearest.
fn method_line(method: &MethodFigures) -> String {
    match method {
        MethodFigures::Rtn => String::new(),
        MethodFigures::Clip { mean_ratio, .. } => format!("method     clipping search, mean range ratio {mean_ratio:.3}\n"),
        MethodFigures::Hqq(h) => format!(
            "method     HQQ, {:.1} iterations per group, l{} error {:.4e} -> {:.4e}\n",
            h.mean_iterations, h.p, h.lp_before, h.lp_after
        ),
        MethodFigures::Gptq(g) => format!(
            "method     GPTQ, dampening {}, {}, {} dead columns, accumulated loss {:.4e}\n",
            g.damp,
            if g.act_order { "activation order" } else { "column order" },
            g.dead_columns,
            g.quadratic_loss
        ),
        MethodFigures::Awq(a) => format!("method     AWQ, chosen alpha {:.2}{}\n", a.alpha, if a.clip { " with clipping search" } else { "" }),
    }
}

/// Bits per weight to four places, a tie rounded up as the page rounds it (JavaScript's
/// `toFixed`): 4 + 20/128 = 4.15625 reads 4.1563 in both, where Rust's `{:.4}` gives 4.1562.
pub(crate) fn four_places(x: f64) -> String {
    format!("{:.4}", (x * 1e4).round() / 1e4)
}
