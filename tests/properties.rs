//! Properties that must hold for every input, checked on random inputs (proptest): how far
//! round to nearest may move a value on every grid, what quantizing a quantized tensor again
//! does, that the bit cost grows with bits and with smaller groups, that the packed file gives
//! back exactly the analysis's x̂ for any shape, and that a recipe's text forms parse back to
//! themselves. Each property names its source beside it.
//!
//! Case counts keep the whole file at a few seconds in the unoptimised test build.

#![cfg(not(target_arch = "wasm32"))]

use bitloupe::analysis::Analysis;
use bitloupe::calib::Calibration;
use bitloupe::cost::BitCost;
use bitloupe::demo::Rng;
use bitloupe::formats::{Format, Grid};
use bitloupe::grid::{GroupParams, IntGrid};
use bitloupe::packed::{pack, unpack};
use bitloupe::recipe::Method;
use bitloupe::{analyze, analyze_with, DType, Error, Granularity, Recipe, ScaleDType, Tensor};
use ndarray::Array2;
use proptest::prelude::*;
use proptest::sample::select;

static SCALE_TYPES: [ScaleDType; 4] = [ScaleDType::F16, ScaleDType::BF16, ScaleDType::F32, ScaleDType::E8M0];
/// The scale types a non-MX scaled format accepts.
static FLOAT_SCALE_TYPES: [ScaleDType; 3] = [ScaleDType::F16, ScaleDType::BF16, ScaleDType::F32];
/// NF4 and the small floats: fixed levels times a fitted group scale.
static SCALED: [Format; 6] = [Format::Nf4, Format::E2m1, Format::E2m3, Format::E3m2, Format::E4m3, Format::E5m2];
static MX: [Format; 6] = [Format::Mxfp4, Format::Mxfp6e2m3, Format::Mxfp6e3m2, Format::Mxfp8e4m3, Format::Mxfp8e5m2, Format::Mxint8];
static METHODS: [Method; 5] = [Method::Rtn, Method::Clip, Method::Hqq, Method::Gptq, Method::Awq];

// ------------------------------------------------------------------ inputs

/// Group or tensor values: mostly moderate, some exact zeros, some outliers, at one of seven
/// magnitudes, sometimes shifted so that a group is all positive or all negative.
fn values(len: impl Into<prop::collection::SizeRange>) -> impl Strategy<Value = Vec<f32>> {
    let element = prop_oneof![8 => -1.0f32..1.0, 1 => Just(0.0f32), 1 => -8.0f32..8.0];
    let shift = prop_oneof![3 => Just(0.0f32), 1 => -2.0f32..2.0];
    (prop::collection::vec(element, len), -3i32..=3, shift).prop_map(|(v, exponent, shift)| {
        let magnitude = 10f32.powi(exponent);
        v.into_iter().map(|x| (x + shift) * magnitude).collect()
    })
}

/// Extra probe positions as fractions of a grid's range, a little beyond both ends included.
fn probes() -> impl Strategy<Value = Vec<f64>> {
    prop::collection::vec(-0.25f64..1.25, 0..16)
}

fn int_grid(bits: u8, symmetric: bool, scale_dtype: ScaleDType) -> IntGrid {
    IntGrid::new(&Recipe { bits, symmetric, scale_dtype, ..Recipe::default() })
}

/// Every grid a recipe can fit: integer grids of every width, mode and scale type (E8M0
/// included: a recipe may pair it with the integer grid), NF4 and the small floats with a
/// float scale, and the MX blocks.
fn any_grid() -> impl Strategy<Value = Grid> {
    prop_oneof![
        (2u8..=8, any::<bool>(), select(&SCALE_TYPES[..])).prop_map(|(bits, symmetric, dtype)| Grid::Int(int_grid(bits, symmetric, dtype))),
        (select(&SCALED[..]), select(&FLOAT_SCALE_TYPES[..])).prop_map(|(format, scale_dtype)| Grid::Scaled { format, scale_dtype }),
        select(&MX[..]).prop_map(Grid::Mx),
    ]
}

fn granularity() -> impl Strategy<Value = Granularity> {
    prop_oneof![
        Just(Granularity::Tensor),
        Just(Granularity::Row),
        (8usize..=64).prop_map(Granularity::Group),
        (65usize..=4096).prop_map(Granularity::Group),
    ]
}

/// A valid round-to-nearest recipe of any format.
fn rtn_recipe() -> impl Strategy<Value = Recipe> {
    let per_tensor_or_row = prop_oneof![Just(Granularity::Tensor), Just(Granularity::Row)];
    prop_oneof![
        (2u8..=8, any::<bool>(), select(&SCALE_TYPES[..]), granularity())
            .prop_map(|(bits, symmetric, scale_dtype, granularity)| Recipe { bits, symmetric, scale_dtype, granularity, ..Recipe::default() }),
        (select(&SCALED[..]), select(&FLOAT_SCALE_TYPES[..]), granularity(), any::<bool>()).prop_map(|(format, scale_dtype, granularity, double_quant)| Recipe {
            format,
            scale_dtype,
            granularity,
            symmetric: true,
            double_quant: double_quant && format == Format::Nf4,
            ..Recipe::default()
        }),
        select(&MX[..]).prop_map(Recipe::for_format),
        (1u8..=8, per_tensor_or_row, any::<bool>())
            .prop_map(|(bits, granularity, symmetric)| Recipe { format: Format::Codebook, bits, granularity, symmetric, ..Recipe::default() }),
    ]
}

/// A valid recipe with any method, dampening, smoothing and kept values.
fn any_recipe() -> impl Strategy<Value = Recipe> {
    let keep = prop_oneof![2 => Just((0usize, 0.0f32)), 1 => (1usize..=3).prop_map(|k| (k, 0.0)), 1 => (0.0f32..=0.1).prop_map(|f| (0, f))];
    let extras = (0.0f32..=1.0, any::<bool>(), any::<bool>(), prop::option::of(0.0f32..=1.0));
    (rtn_recipe(), select(&METHODS[..]), extras, keep)
        .prop_map(|(base, method, (damp, act_order, awq_clip, smooth), (keep_cols, keep_frac))| {
            // HQQ needs the asymmetric integer grid; draw it half the time it is asked for.
            let symmetric = base.symmetric && !(method == Method::Hqq && base.format == Format::Int);
            Recipe { method, symmetric, damp, act_order, awq_clip, smooth, keep_cols, keep_frac, ..base }
        })
        .prop_filter("a combination the recipe accepts", |r| r.validate().is_ok())
}

fn tensor_of(rows: usize, cols: usize, values: Vec<f32>) -> Tensor {
    Tensor::from_values("w", DType::F32, Array2::from_shape_vec((rows, cols), values).expect("rows × cols values"))
}

/// A [rows, cols] tensor with rows in 1..=4 and cols in 1..=80 (odd widths against every group
/// size included).
fn small_tensor() -> impl Strategy<Value = Tensor> {
    (1usize..=4, 1usize..=80).prop_flat_map(|(rows, cols)| values(rows * cols).prop_map(move |v| tensor_of(rows, cols, v)))
}

// ------------------------------------------------------------------ helpers

/// Room for the f32 arithmetic of dividing by the scale and multiplying back: a few units in the
/// last place of the magnitudes involved.
fn slack(magnitudes: &[f32]) -> f64 {
    4.0 * f64::from(f32::EPSILON) * magnitudes.iter().map(|m| f64::from(m.abs())).sum::<f64>()
}

/// The grid points just below and just above `v` (both the end point outside the range).
fn neighbours(points: &[f32], v: f32) -> (f32, f32) {
    let above = points.partition_point(|&p| p < v);
    (points[above.saturating_sub(1).min(points.len() - 1)], points[above.min(points.len() - 1)])
}

/// Check that `hat` (the reconstruction of `v`) is a point of the grid and a nearest one, and so
/// inside the range no further from `v` than half the gap between the points around `v`.
fn check_nearest(points: &[f32], v: f32, hat: f32) -> Result<(), TestCaseError> {
    prop_assert!(points.contains(&hat), "{hat:e} (from {v:e}) is not a grid point");
    let (below, above) = neighbours(points, v);
    let err = f64::from((v - hat).abs());
    let nearest = f64::from((v - below).abs()).min(f64::from((v - above).abs()));
    let room = slack(&[v, hat, below, above]);
    prop_assert!(err <= nearest + room, "{v:e} went to {hat:e}, but one of its neighbours {below:e}, {above:e} is nearer");
    if points[0] <= v && v <= points[points.len() - 1] {
        prop_assert!(err <= f64::from(above - below) / 2.0 + room, "{v:e} → {hat:e}: more than half the gap [{below:e}, {above:e}]");
    }
    Ok(())
}

/// The elements of group `g` of an analysis: (row, column) pairs.
fn group_cells(a: &Analysis, g: usize) -> Vec<(usize, usize)> {
    let (rows, cols) = a.group_span(g).expect("a group of the analysis");
    rows.flat_map(|r| cols.clone().map(move |c| (r, c))).collect()
}

fn same_bits(a: &Array2<f32>, b: &Array2<f32>) -> bool {
    a.iter().zip(b.iter()).all(|(x, y)| x.to_bits() == y.to_bits())
}

// ------------------------------------------------------------------ grids

proptest! {
    #![proptest_config(ProptestConfig::with_cases(512))]

    /// Source: common practice (the premise of Bennett's Δ²/12 noise model, 1948): round to
    /// nearest on a uniform grid of step Δ moves a value inside the grid's range by at most Δ/2.
    /// Here Δ is the stored scale s, so the bound holds whatever rounding the scale went through.
    #[test]
    fn integer_grids_err_by_at_most_half_a_step_inside_their_range(
        bits in 2u8..=8,
        symmetric: bool,
        scale_dtype in select(&SCALE_TYPES[..]),
        x in values(1..=64),
        probes in probes(),
    ) {
        let grid = int_grid(bits, symmetric, scale_dtype);
        let p = grid.fit(&x).expect("values far inside every scale type's range");
        let points = Grid::Int(grid).points(p);
        let (lowest, highest) = (points[0], points[points.len() - 1]);
        // The grid is uniform: its points are s apart (up to the rounding of (q − z)·s).
        for w in points.windows(2) {
            prop_assert!((f64::from(w[1] - w[0]) - f64::from(p.scale)).abs() <= slack(&[w[0], w[1]]));
        }
        let mut hat = vec![0f32; x.len()];
        grid.quantize_into(p, &x, &mut hat);
        let probed: Vec<f32> = probes.iter().map(|f| (f64::from(lowest) + f * f64::from(highest - lowest)) as f32).collect();
        let probed_hat: Vec<f32> = probed.iter().map(|&v| grid.dequantize_one(p, v)).collect();
        for (&v, &h) in x.iter().zip(&hat).chain(probed.iter().zip(&probed_hat)) {
            if lowest <= v && v <= highest {
                prop_assert!(f64::from((v - h).abs()) <= f64::from(p.scale) / 2.0 + slack(&[v, h]), "{v:e} → {h:e} with step {:e}", p.scale);
            }
        }
    }

    /// Source: the definition of round to nearest (common practice; the OCP MX and OFP8
    /// specifications' round-to-nearest conversions; QLoRA's NF4 maps a value to its nearest
    /// level): x̂ is a point of the group's grid and no other point is nearer to x, so inside the
    /// range |x − x̂| is at most half the gap between the two points around x. Outside it, the
    /// nearest point is the end point (saturation).
    #[test]
    fn every_grid_rounds_to_a_nearest_point(grid in any_grid(), x in values(1..=64), probes in probes()) {
        let p = grid.fit(&x).expect("values far inside every scale type's range");
        let points = grid.points(p);
        prop_assert!(points.windows(2).all(|w| w[0] < w[1]), "grid points ascend");
        let mut hat = vec![0f32; x.len()];
        grid.quantize_into(p, &x, &mut hat);
        for (&v, &h) in x.iter().zip(&hat) {
            check_nearest(&points, v, h)?;
        }
        let (lowest, highest) = (f64::from(points[0]), f64::from(points[points.len() - 1]));
        for f in probes {
            let v = (lowest + f * (highest - lowest)) as f32;
            check_nearest(&points, v, grid.dequantize_one(p, v))?;
        }
    }

    /// Source: a rounding map onto a fixed set of points is idempotent (common practice): with the
    /// group's fitted parameters kept, quantizing x̂ again gives x̂ bit for bit.
    #[test]
    fn quantizing_again_with_the_same_parameters_changes_nothing(grid in any_grid(), x in values(1..=64)) {
        let p = grid.fit(&x).expect("values far inside every scale type's range");
        let mut hat = vec![0f32; x.len()];
        grid.quantize_into(p, &x, &mut hat);
        let mut again = vec![0f32; x.len()];
        grid.quantize_into(p, &hat, &mut again);
        for (h, a) in hat.iter().zip(&again) {
            prop_assert_eq!(h.to_bits(), a.to_bits(), "{:e} became {:e}", h, a);
        }
    }
}

// ------------------------------------------------------------------ whole recipes

proptest! {
    #![proptest_config(ProptestConfig::with_cases(160))]

    /// Source: as above, through the whole analysis: under round to nearest (clipping methods
    /// may clip, so they are left out) every element's x̂ is a point of its group's grid, the
    /// nearest one, within half the local gap inside the range; on integer grids within half the
    /// group's stored step.
    #[test]
    fn analyses_round_every_element_to_its_group_s_nearest_point(recipe in rtn_recipe(), t in small_tensor()) {
        prop_assert!(recipe.validate().is_ok(), "{}", recipe.label());
        let a = analyze(&t, &recipe).unwrap();
        let x_hat = a.dequantized(&t).unwrap();
        for g in 0..a.groups.rows * a.groups.per_row {
            let points = a.grid_points(g);
            let step = (recipe.format == Format::Int).then(|| a.params[g].scale);
            for (r, c) in group_cells(&a, g) {
                let (v, h) = (t.values[[r, c]], x_hat[[r, c]]);
                check_nearest(&points, v, h)?;
                if let Some(s) = step.filter(|_| points[0] <= v && v <= points[points.len() - 1]) {
                    prop_assert!(f64::from((v - h).abs()) <= f64::from(s) / 2.0 + slack(&[v, h]));
                }
            }
        }
    }

    /// Running the recipe again on its own output x̂.
    ///
    /// Source: "a quantized tensor survives a second pass" (common practice), which holds exactly
    /// when the second fit finds the first one's parameters. The fit is anchored on the group's
    /// extremes (min/max, absmax, or ⌊log2 absmax⌋ for MX; crate/src/grid.rs and
    /// crate/src/formats/mod.rs), so:
    /// * codebooks and the MX float blocks: always a fixed point (x̂ has at most 2^b distinct
    ///   values, which are already the codebook's best levels; an MX element rounds its block's largest
    ///   magnitude to no less than 2^emax and no more than the format's maximum < 2^(emax+1));
    /// * MXINT8: a fixed point unless a block used the code −128 (−2·X), the only element whose
    ///   magnitude lifts ⌊log2 max|x̂|⌋ by one and so doubles the second pass's block scale;
    /// * integer grids, NF4 and the small floats: a group refits the same parameters, and so
    ///   keeps x̂ bit for bit, whenever x̂ reaches the grid's anchoring end points (f32 scales:
    ///   the same zero point, the scale within two units in the last place). That always
    ///   happens on symmetric grids with float scales whose unrounded scale is a normal number of
    ///   its type (the scale's rounding error, at most 2⁻⁸ relative, cannot move the largest
    ///   magnitude off the top level); it can fail on asymmetric grids (the zero point is
    ///   rounded to a whole code, so the top code may go unused), with E8M0 scales (rounded up, by
    ///   up to 2×) and with scales below their type's normal range. The second fit then anchors a
    ///   narrower grid whose points are not x̂'s, and x̂ moves: for example int2 with E8M0 scales
    ///   turns [−1, 1.4] into x̂ = [−1, 1] (scale 1, zero 1, top code unused). These follow from the stated min/max rule, which the numpy
    ///   cross-checks fix, so they are not treated as faults;
    /// * NF4 with double quantization is left out: its block constants are re-derived from a new
    ///   mean and new steps on the second pass.
    #[test]
    fn a_second_pass_keeps_every_anchored_group(recipe in rtn_recipe().prop_filter("not double-quantized", |r| !r.double_quant), t in small_tensor()) {
        let first = analyze(&t, &recipe).unwrap();
        let first_hat = first.dequantized(&t).unwrap().into_owned();
        let hat_tensor = Tensor::from_values("x̂", DType::F32, first_hat.clone());
        let again = analyze(&hat_tensor, &recipe).unwrap();
        let again_hat = again.dequantized(&hat_tensor).unwrap();
        let format = recipe.format;
        if format == Format::Codebook || (format.is_mx() && format != Format::Mxint8) {
            prop_assert!(same_bits(&first_hat, &again_hat), "{} moved x̂", recipe.label());
            return Ok(());
        }
        for g in 0..first.groups.rows * first.groups.per_row {
            let points = first.grid_points(g);
            let cells = group_cells(&first, g);
            let hat: Vec<f32> = cells.iter().map(|&rc| first_hat[rc]).collect();
            let kept_bit_for_bit = cells.iter().all(|&rc| first_hat[rc].to_bits() == again_hat[rc].to_bits());
            if format == Format::Mxint8 {
                if !hat.contains(&points[0]) {
                    prop_assert!(kept_bit_for_bit, "MXINT8 block {g} moved without code −128");
                }
                continue;
            }
            // What the fit sees: the range with 0 included (grid::min_max).
            let lo = hat.iter().fold(0f32, |m, &v| m.min(v));
            let hi = hat.iter().fold(0f32, |m, &v| m.max(v));
            let top = points[points.len() - 1];
            let asymmetric = format == Format::Int && !recipe.symmetric;
            let anchored = if asymmetric { lo == points[0] && hi == top } else { (-lo).max(hi) == top };
            let unit_max = match format {
                Format::Int => f32::from((1u16 << (recipe.bits - 1)) - 1),
                f => f.element().map_or(1.0, |e| e.max),
            };
            let absmax = cells.iter().fold(0f32, |m, &rc| m.max(t.values[rc].abs()));
            let normal_scale = absmax / unit_max >= recipe.scale_dtype.smallest_normal();
            if !asymmetric && recipe.scale_dtype != ScaleDType::E8M0 && normal_scale {
                prop_assert!(anchored, "{} group {g}: x̂ does not reach the top level {top:e}", recipe.label());
            }
            let (p, q) = (first.params[g], again.params[g]);
            if anchored && recipe.scale_dtype == ScaleDType::F32 {
                // An f32 scale is not rounded to a coarser type, so the refit's own f32
                // arithmetic (the end points (q − z)·s, their difference, the division by the
                // code span) can land a unit or two in the last place away from s.
                prop_assert_eq!(q.zero, p.zero, "{} group {}", recipe.label(), g);
                prop_assert!(q.scale.to_bits().abs_diff(p.scale.to_bits()) <= 2, "{} group {g}: scale {:e} became {:e}", recipe.label(), p.scale, q.scale);
                for &rc in &cells {
                    let (h, h2) = (first_hat[rc], again_hat[rc]);
                    prop_assert!(f64::from((h - h2).abs()) <= slack(&[h]), "{} group {g}: {h:e} became {h2:e}", recipe.label());
                }
            } else if anchored {
                prop_assert_eq!(q, p, "{} group {}", recipe.label(), g);
            }
            if q == p || hat.iter().all(|&v| v == 0.0) {
                prop_assert!(kept_bit_for_bit, "{} group {g} moved with the same parameters", recipe.label());
            }
        }
    }
}

// ------------------------------------------------------------------ bit cost

proptest! {
    #![proptest_config(ProptestConfig::with_cases(256))]

    /// Source: the cost equation of crate/src/cost.rs (payload n·b plus per-group scales and zero
    /// points): every part grows with the element bits b and with the group count, so the total
    /// never falls when bits rise or groups shrink (common practice: "more bits, smaller groups,
    /// more memory"). Formats that fix their own element width do not depend on the recipe's
    /// bits at all.
    #[test]
    fn bit_cost_grows_with_bits_and_with_smaller_groups(recipe in any_recipe(), rows in 0u64..=5000, cols in 0u64..=5000, sizes in prop::collection::vec(8usize..=4096, 1..6)) {
        let cost = |r: &Recipe| BitCost::of_shape(r, rows, cols, 16);
        let by_bits: Vec<u64> = (1u8..=8).map(|bits| Recipe { bits, ..recipe }).filter(|r| r.validate().is_ok()).map(|r| cost(&r).total_bits).collect();
        prop_assert!(by_bits.windows(2).all(|w| w[0] <= w[1]), "{}: {:?} over rising bits", recipe.label(), by_bits);
        if !matches!(recipe.format, Format::Int | Format::Codebook) {
            prop_assert!(by_bits.windows(2).all(|w| w[0] == w[1]), "{}: its own element width", recipe.label());
        }
        // Coarsest to finest: one group, one per row, then groups of falling size.
        let mut sizes = sizes;
        sizes.sort_unstable_by(|a, b| b.cmp(a));
        let coarse_to_fine = [Granularity::Tensor, Granularity::Row].into_iter().chain(sizes.into_iter().map(Granularity::Group));
        let by_groups: Vec<u64> = coarse_to_fine.map(|granularity| Recipe { granularity, ..recipe }).filter(|r| r.validate().is_ok()).map(|r| cost(&r).total_bits).collect();
        prop_assert!(by_groups.windows(2).all(|w| w[0] <= w[1]), "{}: {:?} over shrinking groups", recipe.label(), by_groups);
        // The tensor-sized entry point counts the same.
        if rows * cols <= 1 << 20 {
            prop_assert_eq!(BitCost::of(&recipe, rows as usize, cols as usize, 16), cost(&recipe));
        }
    }
}

// ------------------------------------------------------------------ packed files

/// A stored shape of 0 to 3 dimensions and at most a few hundred elements.
fn stored_shape() -> impl Strategy<Value = Vec<usize>> {
    prop_oneof![
        1 => Just(vec![]),
        3 => (1usize..=90).prop_map(|n| vec![n]),
        6 => (1usize..=6, 1usize..=90).prop_map(|(r, c)| vec![r, c]),
        2 => (1usize..=4, 1usize..=6, 1usize..=15).prop_map(|(a, b, c)| vec![a, b, c]),
    ]
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(96))]

    /// Source: the packed layout's contract (README, crate/src/packed.rs): unpacking a packed
    /// analysis gives back its stored shape and x̂ bit for bit, for every recipe the layout holds
    /// and every shape, group sizes that do not divide the row included. The one refusal the
    /// layout documents (a GPTQ kept value that is not an f16 value after smoothing) is allowed.
    #[test]
    fn packed_files_unpack_to_the_same_tensor(
        recipe in any_recipe(),
        (shape, values) in stored_shape().prop_flat_map(|shape| {
            let n = shape.iter().product::<usize>();
            (Just(shape), values(n))
        }),
        seed: u64,
    ) {
        let (rows, cols) = bitloupe::tensor::view_2d(&shape).unwrap();
        let mut t = tensor_of(rows, cols, values);
        t.shape = shape.clone();
        let recipe = Recipe { keep_cols: recipe.keep_cols.min(cols), ..recipe };
        let needs_calibration = matches!(recipe.method, Method::Gptq | Method::Awq) || recipe.smooth.is_some();
        let mut rng = Rng::new(seed);
        let calib = needs_calibration.then(|| Calibration::from_sample(Array2::from_shape_fn((8, cols), |_| rng.normal() as f32)));
        let a = analyze_with(&t, &recipe, calib.as_ref(), &mut |_, _| {}).unwrap();
        let bytes = match pack(&a, &t) {
            Ok(bytes) => bytes,
            Err(Error::BadRecipe { detail }) if recipe.method == Method::Gptq && recipe.smooth.is_some() && detail.contains("not an f16 value") => return Ok(()),
            Err(e) => return Err(TestCaseError::fail(format!("{}: {e}", recipe.label()))),
        };
        let (back_shape, back) = unpack(&bytes[..]).unwrap();
        prop_assert_eq!(&back_shape, &shape);
        prop_assert!(same_bits(&back, &a.dequantized(&t).unwrap()), "{} on {:?} does not round-trip bit for bit", recipe.label(), shape);
    }
}

// ------------------------------------------------------------------ recipe texts

/// Any mix of upper and lower case, with spaces around (the parsers trim and ignore case).
fn spelled(canonical: &str, upper: &[bool], spaces: (usize, usize)) -> String {
    let body: String = canonical.chars().zip(upper.iter().cycle()).map(|(c, &u)| if u { c.to_ascii_uppercase() } else { c }).collect();
    format!("{}{body}{}", " ".repeat(spaces.0), " ".repeat(spaces.1))
}

fn spelling() -> impl Strategy<Value = (Vec<bool>, (usize, usize))> {
    (prop::collection::vec(any::<bool>(), 1..12), (0usize..3, 0usize..3))
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(256))]

    /// Source: the page's permalink stores JSON.stringify of the recipe and reads it back with
    /// JSON.parse (www/app.js); the core's side is serde. Printing then parsing gives the same
    /// recipe (f32 fields included: serde_json prints the shortest text that reads back
    /// exactly), and parsing then printing gives the same text.
    #[test]
    fn recipes_survive_their_json_text(recipe in any_recipe()) {
        let text = serde_json::to_string(&recipe).unwrap();
        let parsed: Recipe = serde_json::from_str(&text).unwrap();
        prop_assert_eq!(parsed, recipe);
        prop_assert_eq!(serde_json::to_string(&parsed).unwrap(), text);
    }

    /// Source: the command line's --group, --format, --scale-dtype and --method flags parse
    /// with FromStr (crate/src/main.rs) and the core prints the same values with Display or
    /// name(): printing then parsing gives the value back, parsing then printing gives the
    /// canonical text back, whatever its case and surrounding spaces. Recipe::label is a
    /// display string that nothing parses, so it has no round trip to keep.
    #[test]
    fn recipe_words_survive_their_text(
        granularity in granularity(),
        format in select([&SCALED[..], &MX[..], &[Format::Int, Format::Codebook][..]].concat()),
        scale_dtype in select(&SCALE_TYPES[..]),
        method in select(&METHODS[..]),
        (upper, spaces) in spelling(),
    ) {
        let text = granularity.to_string();
        let parsed: Granularity = spelled(&text, &upper, spaces).parse().unwrap();
        prop_assert_eq!(parsed, granularity);
        prop_assert_eq!(parsed.to_string(), text);

        let parsed: Format = spelled(format.name(), &upper, spaces).parse().unwrap();
        prop_assert_eq!(parsed, format);
        prop_assert!(Format::NAMES.split(", ").any(|n| n == format.name()), "{} is listed", format.name());
        // The page's JSON and the command line spell a format the same way.
        prop_assert_eq!(serde_json::to_value(format).unwrap(), serde_json::Value::from(format.name()));

        let parsed: ScaleDType = spelled(scale_dtype.name(), &upper, spaces).parse().unwrap();
        prop_assert_eq!(parsed, scale_dtype);
        prop_assert_eq!(serde_json::to_value(scale_dtype).unwrap(), serde_json::Value::from(scale_dtype.name()));

        let parsed: Method = spelled(method.name(), &upper, spaces).parse().unwrap();
        prop_assert_eq!(parsed, method);
        prop_assert_eq!(serde_json::to_value(method).unwrap(), serde_json::Value::from(method.name()));
    }
}

/// The helper the properties lean on finds the points around a value, ends included.
#[test]
fn neighbours_bracket_a_value() {
    let points = [-1.0, 0.0, 0.5, 2.0];
    assert_eq!(neighbours(&points, 0.2), (0.0, 0.5));
    assert_eq!(neighbours(&points, 0.5), (0.0, 0.5));
    assert_eq!(neighbours(&points, -3.0), (-1.0, -1.0));
    assert_eq!(neighbours(&points, 9.0), (2.0, 2.0));
    let p = GroupParams { scale: 1.0, zero: 0.0 };
    assert_eq!(Grid::Int(int_grid(2, true, ScaleDType::F32)).points(p), vec![-2.0, -1.0, 0.0, 1.0]);
}


/// A counterexample the packed-file property found, kept as a plain case: HQQ with a zero point
/// of 0 wrote −0 for a value just below 0, which no code of the packed file decodes to, so the
/// analysis could not be packed.
#[test]
fn hqq_groups_with_a_zero_point_of_zero_pack() {
    let recipe = Recipe { bits: 2, granularity: Granularity::Row, method: Method::Hqq, ..Recipe::default() };
    let t = tensor_of(1, 3, vec![-0.04, 0.91, 0.085]);
    let a = analyze(&t, &recipe).unwrap();
    assert_eq!(a.params[0].zero, 0.0);
    let (_, back) = unpack(&pack(&a, &t).unwrap()[..]).unwrap();
    assert!(same_bits(&back, &a.dequantized(&t).unwrap()));
}
