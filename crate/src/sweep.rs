//! Sweeps: every combination of a few recipe choices run on one tensor, and the Pareto front of
//! bits per weight against error.
//!
//! Each combination starts from its format's usual recipe (`Recipe::for_format`), then takes
//! the swept bits (integer grids and codebooks only: the other formats fix their width), group
//! (MX formats accept only their block of 32), method, scale type (MX formats always use E8M0,
//! codebooks store f16 levels), smoothing strength and kept fraction. Combinations that make no sense fail the recipe check and
//! are skipped and counted; duplicates are run once. Every row comes from the same `analyze_with`
//! as a single analysis, so its figures are identical.
//!
//! A point is on the Pareto front when no other point has both fewer bits per weight and a lower
//! error, one of them strictly (both axes minimised; SQNR is negated).

use crate::analysis::{headline, is_plain, Headline};
use crate::calib::Calibration;
use crate::error::{Error, Result};
use crate::formats::Format;
use crate::recipe::{Granularity, Method, Recipe, ScaleDType};
use crate::tensor::Tensor;
use serde::{Deserialize, Serialize};
use std::str::FromStr;

/// The choices to combine.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SweepSpec {
    /// Formats.
    pub formats: Vec<Format>,
    /// Bits (for integer grids and codebooks).
    pub bits: Vec<u8>,
    /// Granularities.
    pub groups: Vec<Granularity>,
    /// Methods.
    pub methods: Vec<Method>,
    /// Scale types.
    pub scale_dtypes: Vec<ScaleDType>,
    /// Smoothing strengths (`None`: no smoothing).
    #[serde(default = "no_smoothing")]
    pub smooth: Vec<Option<f32>>,
    /// Fractions of weights kept in 16-bit.
    #[serde(default = "nothing_kept")]
    pub keep_fracs: Vec<f32>,
}

fn no_smoothing() -> Vec<Option<f32>> {
    vec![None]
}

fn nothing_kept() -> Vec<f32> {
    vec![0.0]
}

/// The error the Pareto front is drawn against.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum ParetoBy {
    /// SQNR (higher is better).
    Sqnr,
    /// Weight MSE.
    Mse,
    /// Output error on the calibration data.
    Output,
}

impl FromStr for ParetoBy {
    type Err = Error;
    fn from_str(s: &str) -> Result<Self> {
        match s.trim().to_ascii_lowercase().as_str() {
            "sqnr" => Ok(ParetoBy::Sqnr),
            "mse" => Ok(ParetoBy::Mse),
            "output" => Ok(ParetoBy::Output),
            _ => Err(Error::BadRecipe { detail: format!("'{s}' is not one of sqnr, mse, output") }),
        }
    }
}

/// One finished recipe of a sweep.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SweepRow {
    /// The recipe.
    pub recipe: Recipe,
    /// Its short label.
    pub label: String,
    /// Bits per weight, all parts counted.
    pub bits_per_weight: f64,
    /// SQNR in dB (`None` when exact).
    pub sqnr_db: Option<f64>,
    /// Weight MSE.
    pub mse: f64,
    /// Output error, with calibration.
    pub output_rel_err: Option<f64>,
    /// Whether it is on the Pareto front.
    pub pareto: bool,
}

impl SweepRow {
    /// The row of one recipe's figures (off the front until [`mark_front`] says otherwise).
    pub fn of(h: &Headline) -> Self {
        SweepRow {
            recipe: h.recipe,
            label: h.recipe.label(),
            bits_per_weight: h.cost.bits_per_weight,
            sqnr_db: h.totals.sqnr_db,
            mse: h.totals.mse,
            output_rel_err: h.output.as_ref().map(|o| o.rel_err),
            pareto: false,
        }
    }
}

/// Combinations a sweep did not run, counted by why, in the order the reasons were first met, so
/// that the user learns which choice left them out (MXFP4 with groups other than 32, say), not
/// only how many.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
#[serde(transparent)]
pub struct Skipped(Vec<SkipReason>);

/// One reason a sweep skipped combinations, and how many.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SkipReason {
    /// What was wrong, as the recipe check or the run put it.
    pub why: String,
    /// Combinations skipped for it.
    pub count: usize,
}

impl Skipped {
    /// Count one combination skipped because of `error`.
    pub fn add(&mut self, error: &Error) {
        self.count_for(SkipReason { why: fault(error), count: 1 });
    }

    /// Every combination skipped by `self` or `other`.
    pub fn merged(mut self, other: Skipped) -> Skipped {
        other.0.into_iter().for_each(|reason| self.count_for(reason));
        self
    }

    /// Add `reason`'s count to the reason of the same words, or list it after the others.
    fn count_for(&mut self, reason: SkipReason) {
        match self.0.iter_mut().find(|r| r.why == reason.why) {
            Some(known) => known.count += reason.count,
            None => self.0.push(reason),
        }
    }

    /// Combinations skipped in all.
    pub fn count(&self) -> usize {
        self.0.iter().map(|r| r.count).sum()
    }

    /// The reasons, in the order first met.
    pub fn reasons(&self) -> &[SkipReason] {
        &self.0
    }
}

/// "3 combinations skipped: why (2); why (1)", or "no combination skipped".
impl std::fmt::Display for Skipped {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self.count() {
            0 => return write!(f, "no combination skipped"),
            1 => write!(f, "1 combination skipped: ")?,
            n => write!(f, "{n} combinations skipped: ")?,
        }
        for (i, reason) in self.0.iter().enumerate() {
            write!(f, "{}{} ({})", if i > 0 { "; " } else { "" }, reason.why, reason.count)?;
        }
        Ok(())
    }
}

/// The recipes of a spec, and the combinations skipped as meaningless; an error naming the first
/// combination's fault when none makes sense.
pub fn recipes(spec: &SweepSpec) -> Result<(Vec<Recipe>, Skipped)> {
    let mut out: Vec<Recipe> = Vec::new();
    let mut skipped = Skipped::default();
    let mut first_fault = None;
    for &format in &spec.formats {
        let base = Recipe::for_format(format);
        let bits: Vec<u8> = if matches!(format, Format::Int | Format::Codebook) { spec.bits.clone() } else { vec![base.bits] };
        let scales: Vec<ScaleDType> = if format.is_mx() || format == Format::Codebook { vec![base.scale_dtype] } else { spec.scale_dtypes.clone() };
        for &b in &bits {
            for &granularity in &spec.groups {
                for &method in &spec.methods {
                    for &scale_dtype in &scales {
                        for &smooth in &spec.smooth {
                            for &keep_frac in &spec.keep_fracs {
                                let recipe = Recipe { bits: b, granularity, method, scale_dtype, smooth, keep_frac, ..base };
                                if let Err(e) = recipe.validate() {
                                    skipped.add(&e);
                                    first_fault.get_or_insert(e);
                                } else if !out.contains(&recipe) {
                                    out.push(recipe);
                                }
                            }
                        }
                    }
                }
            }
        }
    }
    match first_fault {
        _ if !out.is_empty() => Ok((out, skipped)),
        Some(e) => Err(Error::BadRecipe { detail: format!("no combination of the sweep makes a recipe; the first: {}", fault(&e)) }),
        None => Err(Error::BadRecipe { detail: "the sweep has nothing to combine: choose at least one format, width, group, method and scale type".into() }),
    }
}

/// What was wrong with a recipe, without the error's own "bad recipe" heading.
fn fault(e: &Error) -> String {
    match e {
        Error::BadRecipe { detail } => detail.clone(),
        other => other.to_string(),
    }
}

/// Plain recipes without calibration keep no reconstruction (see `crate::analysis`), so a
/// sweep runs up to this many of them side by side on the pool; any other recipe runs alone,
/// spread over the pool itself. Side by side, no run waits for the pool to be handed its blocks
/// and gathered again.
const SIDE_BY_SIDE: usize = 8;

/// Run every recipe; `progress(done, total, row)` after each, in order, with its row unless it
/// failed. Recipes that fail on this tensor (a method that needs calibration, say) are skipped
/// and counted by why too.
pub fn run(
    tensor: &Tensor,
    calib: Option<&Calibration>,
    recipes: &[Recipe],
    by: ParetoBy,
    progress: &mut dyn FnMut(usize, usize, Option<&SweepRow>),
) -> Result<(Vec<SweepRow>, Skipped)> {
    if by == ParetoBy::Output && calib.is_none() {
        return Err(Error::BadRecipe { detail: "a front by output error needs calibration data".into() });
    }
    let one = |recipe: &Recipe| headline(tensor, recipe, calib, &mut |_, _| {}).map(|h| SweepRow::of(&h));
    let light = |recipe: &Recipe| calib.is_none() && is_plain(recipe);
    let mut rows = Vec::with_capacity(recipes.len());
    let mut failed = Skipped::default();
    let mut first_failure = None;
    let mut done = 0;
    while done < recipes.len() {
        let side_by_side = recipes[done..].iter().take(SIDE_BY_SIDE).take_while(|r| light(r)).count().max(1);
        let batch = &recipes[done..done + side_by_side];
        let results = match batch {
            [alone] => vec![one(alone)],
            _ => crate::rows::map_items(batch.len(), |i| one(&batch[i])),
        };
        for result in results {
            done += 1;
            match result {
                Ok(row) => {
                    progress(done, recipes.len(), Some(&row));
                    rows.push(row);
                }
                // A non-finite tensor fails every recipe: that is the user's error, not a skip.
                Err(e @ Error::NonFinite { .. }) => return Err(e),
                Err(e) => {
                    failed.add(&e);
                    first_failure.get_or_insert(e);
                    progress(done, recipes.len(), None);
                }
            }
        }
    }
    if let (true, Some(e)) = (rows.is_empty(), first_failure) {
        return Err(Error::BadRecipe { detail: format!("no recipe of the sweep could run on this tensor; the first: {}", fault(&e)) });
    }
    mark_front(&mut rows, by);
    Ok((rows, failed))
}

/// Set `pareto` on every row: bits per weight against the chosen error.
pub fn mark_front(rows: &mut [SweepRow], by: ParetoBy) {
    let points: Vec<(f64, f64)> = rows.iter().map(|r| (r.bits_per_weight, error_of(r, by))).collect();
    for (row, on) in rows.iter_mut().zip(pareto_front(&points)) {
        row.pareto = on;
    }
}

/// The error of a row on the chosen axis, smaller is better.
pub fn error_of(row: &SweepRow, by: ParetoBy) -> f64 {
    match by {
        ParetoBy::Sqnr => row.sqnr_db.map_or(f64::NEG_INFINITY, |db| -db),
        ParetoBy::Mse => row.mse,
        ParetoBy::Output => row.output_rel_err.unwrap_or(f64::INFINITY),
    }
}

/// Which points (cost, error) no other point dominates, both axes minimised. Sorting by cost
/// and keeping the running minimum of the error makes it O(n log n).
pub fn pareto_front(points: &[(f64, f64)]) -> Vec<bool> {
    let mut order: Vec<usize> = (0..points.len()).collect();
    order.sort_by(|&a, &b| points[a].0.total_cmp(&points[b].0).then(points[a].1.total_cmp(&points[b].1)));
    let mut front = vec![false; points.len()];
    let mut best = f64::INFINITY;
    let mut i = 0;
    while i < order.len() {
        // Points of equal cost: only those with the lowest error there can be on the front.
        let cost = points[order[i]].0;
        let lowest = points[order[i]].1;
        let mut j = i;
        while j < order.len() && points[order[j]].0 == cost {
            if points[order[j]].1 == lowest && lowest < best {
                front[order[j]] = true;
            }
            j += 1;
        }
        best = best.min(lowest);
        i = j;
    }
    front
}

/// The sweep as CSV, one row per recipe.
pub fn to_csv(rows: &[SweepRow]) -> String {
    let mut out = String::from("format,bits,group,method,scale_dtype,label,bits_per_weight,sqnr_db,mse,output_rel_err,pareto\n");
    let opt = |v: Option<f64>| v.map_or(String::new(), |x| format!("{x}"));
    for r in rows {
        let q = &r.recipe;
        out.push_str(&format!(
            "{},{},{},{},{},{},{},{},{},{},{}\n",
            q.format.name(),
            q.format.element_bits(q.bits),
            q.granularity,
            q.method.name(),
            q.scale_dtype.name(),
            r.label,
            r.bits_per_weight,
            opt(r.sqnr_db),
            r.mse,
            opt(r.output_rel_err),
            r.pareto
        ));
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::demo::Rng;

    fn brute_force(points: &[(f64, f64)]) -> Vec<bool> {
        points
            .iter()
            .map(|&(c, e)| !points.iter().any(|&(c2, e2)| c2 <= c && e2 <= e && (c2 < c || e2 < e)))
            .collect()
    }

    /// Property test: on random point sets (with ties on either axis) the front equals the
    /// brute-force definition.
    #[test]
    fn pareto_front_matches_brute_force() {
        let mut rng = Rng::new(6);
        for trial in 0..500 {
            let n = rng.below(40);
            let points: Vec<(f64, f64)> = (0..n).map(|_| (rng.below(8) as f64 + 2.0, (rng.below(10) as f64) * 0.1)).collect();
            assert_eq!(pareto_front(&points), brute_force(&points), "trial {trial}: {points:?}");
        }
    }

    #[test]
    fn meaningless_combinations_are_skipped_and_counted() {
        let spec = SweepSpec {
            formats: vec![Format::Int, Format::Mxfp4, Format::Nf4],
            bits: vec![2, 4],
            groups: vec![Granularity::Group(32), Granularity::Row],
            methods: vec![Method::Rtn, Method::Hqq],
            scale_dtypes: vec![ScaleDType::F16],
            smooth: vec![None],
            keep_fracs: vec![0.0],
        };
        let (recipes, skipped) = recipes(&spec).unwrap();
        // int: 2 bits × 2 groups × 2 methods = 8; mxfp4: group 32 only, rtn only = 1;
        // nf4: 2 groups, rtn only = 2. Skipped: mxfp4 row (2) + mxfp4 hqq (1) + nf4 hqq (2).
        assert_eq!(recipes.len(), 11);
        assert_eq!(skipped.count(), 5);
        // The reasons, by the first check each combination fails, in the order met: HQQ on the
        // zero point (MXFP4 in blocks of 32, NF4 in both groupings), MXFP4 per row on its block
        // (with either method).
        let counts: Vec<(bool, usize)> = skipped.reasons().iter().map(|r| (r.why.contains("mxfp4"), r.count)).collect();
        assert_eq!(counts, [(false, 3), (true, 2)], "{skipped}");
        assert!(skipped.to_string().starts_with("5 combinations skipped: HQQ fits a zero point"), "{skipped}");
        assert!(skipped.to_string().ends_with("; mxfp4 shares one scale per block of 32 (the MX specification); use groups of 32 (2)"), "{skipped}");
    }

    #[test]
    fn skipped_reasons_merge_by_their_words() {
        let bad = |detail: &str| Error::BadRecipe { detail: detail.into() };
        let mut first = Skipped::default();
        first.add(&bad("a"));
        first.add(&bad("a"));
        let mut second = Skipped::default();
        second.add(&bad("b"));
        second.add(&bad("a"));
        let all = first.merged(second);
        assert_eq!(all.count(), 4);
        assert_eq!(all.to_string(), "4 combinations skipped: a (3); b (1)");
        assert_eq!(Skipped::default().to_string(), "no combination skipped");
    }

    /// A sweep with nothing to run is an error naming why, not an empty result.
    #[test]
    fn a_sweep_with_no_recipe_to_run_says_why() {
        let spec = SweepSpec {
            formats: vec![Format::Int],
            bits: vec![99],
            groups: vec![Granularity::Group(128)],
            methods: vec![Method::Rtn],
            scale_dtypes: vec![ScaleDType::F16],
            smooth: vec![None],
            keep_fracs: vec![0.0],
        };
        let message = recipes(&spec).unwrap_err().to_string();
        assert!(message.contains("no combination") && message.contains("99 bits"), "{message}");
        let nothing = SweepSpec { methods: vec![], ..spec.clone() };
        assert!(recipes(&nothing).unwrap_err().to_string().contains("nothing to combine"));
        let gptq = SweepSpec { bits: vec![4], methods: vec![Method::Gptq], ..spec };
        let (plan, _) = recipes(&gptq).unwrap();
        let weight = crate::demo::weight();
        let message = run(&weight, None, &plan, ParetoBy::Mse, &mut |_, _, _| {}).unwrap_err().to_string();
        assert!(message.contains("could run") && message.contains("calibration"), "{message}");
    }

    /// Plain recipes run side by side, others alone: every row is still the recipe's own
    /// analysis, bit for bit, in the plan's order, on one thread or several, and progress comes
    /// once per recipe in order with its row (none for one that failed).
    #[test]
    fn side_by_side_rows_are_each_recipes_own() {
        let mut rng = crate::demo::Rng::new(3);
        let values = ndarray::Array2::from_shape_fn((150, 200), |_| rng.normal() as f32);
        let weight = Tensor::from_values("w", crate::tensor::DType::F32, values);
        let spec = SweepSpec {
            formats: vec![Format::Int, Format::Nf4, Format::Codebook],
            bits: vec![2, 3, 4, 8],
            groups: vec![Granularity::Group(32), Granularity::Group(64), Granularity::Row],
            methods: vec![Method::Rtn, Method::Hqq, Method::Gptq],
            scale_dtypes: vec![ScaleDType::F16],
            smooth: vec![None],
            keep_fracs: vec![0.0, 0.01],
        };
        let (plan, _) = recipes(&spec).unwrap();
        let on = |threads: usize| {
            let pool = rayon::ThreadPoolBuilder::new().num_threads(threads).build().unwrap();
            let mut seen = Vec::new();
            let swept = pool.install(|| run(&weight, None, &plan, ParetoBy::Mse, &mut |done, total, row| seen.push((done, total, row.is_some()))).unwrap());
            (swept, seen)
        };
        let ((rows, failed), seen) = on(3);
        assert!(failed.count() > 0 && failed.to_string().contains("GPTQ"), "GPTQ without calibration fails and is counted: {failed}");
        assert_eq!(seen.iter().map(|s| s.0).collect::<Vec<_>>(), (1..=plan.len()).collect::<Vec<_>>());
        assert_eq!(seen.iter().filter(|s| s.2).count(), rows.len());
        let mut alone: Vec<SweepRow> = plan.iter().filter_map(|r| headline(&weight, r, None, &mut |_, _| {}).ok().map(|h| SweepRow::of(&h))).collect();
        mark_front(&mut alone, ParetoBy::Mse);
        assert_eq!(rows, alone);
        assert_eq!(on(1).0 .0, rows);
    }
}
